"""The sandbox's kubeconfig file: what it holds and when it may be (over)written.

A kubeconfig written by the sandbox opens with :data:`MARKER` (a YAML comment) and names
only the ``ratefit-sandbox`` cluster, user and context. An existing file is overwritten
only when it is one of ours; a user's own kubeconfig (any other file, or a symlink such
as ``~/.kube/config`` pointing elsewhere) is refused with a one-line error unless the
caller forces it (``ratefit sandbox --force``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from ratefit.models.errors import InputError

__all__ = ["MARKER", "KubeconfigExists", "is_sandbox_kubeconfig", "check_target", "write"]

#: first line of every kubeconfig the sandbox writes
MARKER = "# ratefit sandbox kubeconfig: a local stand-in, safe to overwrite with `ratefit sandbox`"
#: a kubeconfig larger than this is not one of ours (ours is a few hundred bytes)
_MAX_OURS = 64 * 1024


class KubeconfigExists(InputError):
    """The kubeconfig path holds a file the sandbox did not write."""


def is_sandbox_kubeconfig(path: Path, context: str) -> bool:
    """True when ``path`` is a regular file the sandbox wrote: it opens with :data:`MARKER`
    and every cluster, user and context in it is named ``context``."""
    if path.is_symlink() or not path.is_file():
        return False
    try:
        if path.stat().st_size > _MAX_OURS:
            return False
        text = path.read_text(encoding="utf-8")
        if not text.startswith(MARKER):
            return False
        doc = yaml.safe_load(text)
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        return False
    if not isinstance(doc, dict) or doc.get("current-context") != context:
        return False
    for section in ("clusters", "users", "contexts"):
        entries = doc.get(section)
        if not isinstance(entries, list) or not entries:
            return False
        if any(not isinstance(e, dict) or e.get("name") != context for e in entries):
            return False
    return True


def check_target(path: str | Path, context: str, *, force: bool = False,
                 what: str = "--kubeconfig", fix: str = "choose another path, or pass --force to replace it") -> Path:
    """Raise :class:`KubeconfigExists` unless ``path`` is free, one of ours, or ``force``.
    ``what`` names the path in the message and ``fix`` says what to do."""
    path = Path(path)
    if force or not (path.exists() or path.is_symlink()):
        return path
    if path.is_dir():
        raise KubeconfigExists(f"{what} {path} is a directory; give a file path")
    if not is_sandbox_kubeconfig(path, context):
        raise KubeconfigExists(
            f"{what} {path} exists and is not a sandbox kubeconfig; refusing to overwrite it ({fix})")
    return path


def write(path: str | Path, doc: dict[str, Any], context: str, *, force: bool = False) -> Path:
    """Write ``doc`` to ``path`` behind :data:`MARKER` (after :func:`check_target`)."""
    path = check_target(path, context, force=force)
    path.parent.mkdir(parents=True, exist_ok=True)
    if force and path.is_symlink():
        path.unlink()  # replace the link itself, never the file it points to
    path.write_text(MARKER + "\n" + yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return path
