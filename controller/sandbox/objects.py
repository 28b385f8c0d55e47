"""Small helpers on plain Kubernetes objects: timestamps, uids, name suffixes,
template hashes, owner references, API versions."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import random
import uuid
from typing import Any

#: the alphabet apimachinery's `rand.String` / `SafeEncodeString` use (no vowels)
_ALPHANUMS = "bcdfghjklmnpqrstvwxz2456789"


def now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def new_uid() -> str:
    return str(uuid.uuid4())


def rand_suffix(n: int = 5) -> str:
    return "".join(random.choice(_ALPHANUMS) for _ in range(n))


def template_hash(template: Any) -> str:
    """A short stable hash of a pod template (like `pod-template-hash`)."""
    digest = hashlib.sha256(json.dumps(template, sort_keys=True).encode()).digest()
    n = int.from_bytes(digest[:8], "big")
    out = []
    for _ in range(10):
        n, r = divmod(n, len(_ALPHANUMS))
        out.append(_ALPHANUMS[r])
    return "".join(out)


def api_version(group: str, version: str) -> str:
    return f"{group}/{version}" if group else version


def owner_ref(obj: dict, *, controller: bool = True) -> dict:
    return {"apiVersion": obj["apiVersion"], "kind": obj["kind"],
            "name": obj["metadata"]["name"], "uid": obj["metadata"]["uid"],
            "controller": controller, "blockOwnerDeletion": True}


def body_of(obj: dict, *, status: bool) -> dict:
    """What `generation` tracks: everything but metadata (and status, when it is separate)."""
    return {k: v for k, v in obj.items()
            if k not in ("metadata", "apiVersion", "kind") and (status or k != "status")}
