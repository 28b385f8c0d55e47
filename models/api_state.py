"""What the sizing API serves: an immutable snapshot of the model store, and its holder.

A ``ServingSnapshot`` is built once from a ``ModelStore.load_all()`` and never changed:
the artifacts, their curves, one ``CurveBank`` for vectorised batch lookups, the
version of every row, the store version and when it was loaded. ``ApiState`` holds
the current snapshot in one attribute. A request reads that attribute once and works
on the snapshot it got, so a reload — which builds a whole new snapshot off to the
side and then rebinds the attribute (a single reference assignment, atomic in
CPython) — never changes the ground under a request in flight: requests that started
before the swap finish on the old set, later ones see the new set, none fail.

Refusals. A file that does not load (corrupt, truncated, edited, wrong key) is never
served. If the key was served before the reload, its last good artifact is kept (the
answer and the log say ``kept_previous``): a damaged file must not take a working
model away from the controller — an SRE can fix or retrain it without an outage. A
key whose file was removed is dropped.
"""

from __future__ import annotations

import gc
import hashlib
import logging
import threading
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

from ratefit.models.curve import CurveBank, DemandCurve
from ratefit.models.errors import RatefitError
from ratefit.models.store import Artifact, ModelStore

__all__ = ["ServingSnapshot", "ReloadReport", "Refusal", "ApiState", "StoreUnreadable", "build_snapshot"]

log = logging.getLogger("ratefit.api")


class StoreUnreadable(RatefitError):
    """The store directory is missing or cannot be listed; the old set keeps serving."""


@dataclass(frozen=True)
class Refusal:
    file: str
    error: str
    kept_previous: bool = False


@dataclass(frozen=True)
class ServingSnapshot:
    """One loaded store; immutable once built."""

    artifacts: Mapping[str, Artifact]
    curves: Mapping[str, DemandCurve]
    bank: CurveBank
    #: artifact version per bank row (same order as ``bank.keys``)
    row_versions: tuple[str, ...]
    #: store version: a hash over every key and artifact version
    version: str
    #: Unix seconds (wall clock) and monotonic seconds of the load
    loaded_at: float
    loaded_mono: float
    refused: tuple[Refusal, ...] = ()
    generation: int = 0

    def __len__(self) -> int:
        return len(self.artifacts)


@dataclass(frozen=True)
class ReloadReport:
    ok: bool
    snapshot: ServingSnapshot | None
    previous: ServingSnapshot | None
    added: int = 0
    removed: int = 0
    changed: int = 0
    unchanged: int = 0
    seconds: float = 0.0
    error: str | None = None
    refused: tuple[Refusal, ...] = field(default_factory=tuple)

    @property
    def result(self) -> str:
        """``ok``, ``partial`` (some files refused) or ``failed`` (store unreadable)."""
        if not self.ok:
            return "failed"
        return "partial" if self.refused else "ok"


def _key_of(relpath: str) -> str | None:
    parts = Path(relpath).parts
    if len(parts) != 3 or not parts[2].endswith(".json"):
        return None
    return f"{parts[0]}/{parts[1]}/{parts[2][: -len('.json')]}"


def build_snapshot(
    store: ModelStore, *, previous: ServingSnapshot | None = None, generation: int = 0
) -> ServingSnapshot:
    """Load every artifact of ``store`` into a new snapshot (see the module docstring)."""
    if not store.root.is_dir():
        raise StoreUnreadable(
            f"model store {str(store.root)!r} is not a directory: create it, or point --store at "
            "the directory `ratefit train` writes to"
        )
    started = time.monotonic()
    loaded = store.load_all()
    artifacts: dict[str, Artifact] = dict(loaded.artifacts)
    refused: list[Refusal] = []
    for rel, message in sorted(loaded.errors.items()):
        key = _key_of(rel)
        keep = previous is not None and key is not None and key in previous.artifacts and key not in artifacts
        if keep:
            artifacts[key] = previous.artifacts[key]  # type: ignore[index]
        refused.append(Refusal(file=rel, error=message, kept_previous=keep))
    keys = sorted(artifacts)
    curves: dict[str, DemandCurve] = {}
    for key in keys:
        before = previous.artifacts.get(key) if previous is not None else None
        if before is not None and before.version == artifacts[key].version:
            # unchanged: keep the objects already built (less work, less garbage)
            artifacts[key] = before
            curves[key] = previous.curves[key]  # type: ignore[union-attr]
        else:
            curves[key] = artifacts[key].demand_curve()
    bank = CurveBank(curves)
    versions = tuple(artifacts[k].version for k in keys)
    digest = hashlib.sha256()
    for k, v in zip(keys, versions):
        digest.update(f"{k}={v}\n".encode())
    return ServingSnapshot(
        artifacts=MappingProxyType({k: artifacts[k] for k in keys}),
        curves=MappingProxyType(curves),
        bank=bank,
        row_versions=versions,
        version=digest.hexdigest()[:12],
        loaded_at=time.time(),
        loaded_mono=started,
        refused=tuple(refused),
        generation=generation,
    )


class ApiState:
    """Holds the snapshot being served; ``reload()`` swaps in a new one."""

    def __init__(self, store_root: str | Path, *, freeze_gc: bool = True) -> None:
        self.store = ModelStore(store_root)
        self.freeze_gc = freeze_gc
        self._snapshot: ServingSnapshot | None = None
        self._lock = threading.Lock()  # one reload at a time; readers never take it
        self._generation = 0

    @property
    def snapshot(self) -> ServingSnapshot | None:
        """The current snapshot (read it once per request and keep the local)."""
        return self._snapshot

    def reload(self) -> ReloadReport:
        """Re-read the store and swap atomically. Never raises for bad files; a store
        that cannot be read at all leaves the old snapshot in place (``ok=False``)."""
        with self._lock:
            started = time.perf_counter()
            previous = self._snapshot
            try:
                new = build_snapshot(self.store, previous=previous, generation=self._generation + 1)
            except (StoreUnreadable, OSError) as exc:
                message = str(exc)
                log.error("store reload failed: %s", message, extra={"event": "reload_failed"})
                return ReloadReport(
                    ok=False,
                    snapshot=previous,
                    previous=previous,
                    seconds=time.perf_counter() - started,
                    error=message,
                )
            self._generation += 1
            self._snapshot = new  # the swap: one reference assignment
            if self.freeze_gc:
                # 10,000 artifacts are ~250,000 GC-tracked objects; a full collection walks
                # them all (hundreds of ms, measured by tests/bench/bench_api.py) while a
                # batch request allocates enough to trigger collections. Moving the loaded
                # set to the permanent generation takes it out of every collection. A
                # snapshot holds no reference cycles (checked in tests/test_api_reload.py),
                # so an old one is still freed by reference counting once the last request
                # using it ends.
                gc.collect(1)
                gc.freeze()
            seconds = time.perf_counter() - started
        old = previous.artifacts if previous is not None else {}
        added = sum(1 for k in new.artifacts if k not in old)
        removed = sum(1 for k in old if k not in new.artifacts)
        changed = sum(1 for k, a in new.artifacts.items() if k in old and old[k].version != a.version)
        unchanged = len(new.artifacts) - added - changed
        for r in new.refused:
            log.warning(
                "artifact refused: %s: %s%s",
                r.file,
                r.error,
                " (the previous version keeps serving)" if r.kept_previous else "",
                extra={"event": "artifact_refused", "file": r.file, "kept_previous": r.kept_previous},
            )
        log.info(
            "store loaded: %d models, version %s, %d refused, %.3fs",
            len(new),
            new.version,
            len(new.refused),
            seconds,
            extra={"event": "store_loaded"},
        )
        return ReloadReport(
            ok=True,
            snapshot=new,
            previous=previous,
            added=added,
            removed=removed,
            changed=changed,
            unchanged=unchanged,
            seconds=seconds,
            refused=new.refused,
        )
