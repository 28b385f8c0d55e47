"""What the sizing API serves: an immutable snapshot of the model store, and its holder.

A ``ServingSnapshot`` is built once from a ``ModelStore.load_all()`` and never changed:
the served models and their curves, one ``CurveBank`` for vectorised batch lookups, the
version of every row, the store version and when it was loaded. ``ApiState`` holds
the current snapshot in one attribute. A request reads that attribute once and works
on the snapshot it got, so a reload — which builds a whole new snapshot off to the
side and then rebinds the attribute (a single reference assignment, atomic in
CPython) — never changes the ground under a request in flight: requests that started
before the swap finish on the old set, later ones see the new set, none fail.

Compact. The snapshot does not keep the parsed ``Artifact`` objects (about 17 KB each
with their float lists): each artifact is turned, as it is read, into a
``ServedModel`` holding its two answers pre-rendered as JSON bytes (the summary for
``/v1/models`` and the detail for ``/v1/models/{key}``) plus its ``DemandCurve``.
Files are read one at a time so the whole store is never in memory as artifacts. A
reload reads and verifies again only the files whose (inode, size, mtime) changed
since the last load: ``ModelStore.save`` replaces a file by rename, so any rewrite is a
new inode; a restart verifies everything.

Refusals. A file that does not load (corrupt, truncated, edited, wrong key, absurd
numbers, not a regular file, too large: see ``models.store``) is never served, and
never stops the others from being served — at start-up as on a reload. Each refusal
carries its ``reason``; messages name the file by its place inside the store, never
by an absolute path. If the key was served before the reload, its last good artifact is kept (the
answer and the log say ``kept_previous``): a damaged file must not take a working
model away from the controller — an SRE can fix or retrain it without an outage. A
key whose file was removed is dropped.
"""

from __future__ import annotations

import dataclasses
import gc
import hashlib
import json
import logging
import threading
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

from ratefit.models.curve import CurveBank, DemandCurve, to_millicores
from ratefit.models.errors import ArtifactError, RatefitError
from ratefit.models.store import Artifact, ArtifactRefused, ModelStore

__all__ = ["ServedModel", "ServingSnapshot", "ReloadReport", "Refusal", "ApiState", "StoreUnreadable", "build_snapshot"]

log = logging.getLogger("ratefit.api")


class StoreUnreadable(RatefitError):
    """The store directory is missing or cannot be listed; the old set keeps serving."""


@dataclass(frozen=True)
class Refusal:
    file: str
    error: str
    kept_previous: bool = False
    #: one of ``models.store.REFUSAL_REASONS``
    reason: str = "corrupt"


@dataclass(frozen=True, slots=True)
class ServedModel:
    """What the API serves about one key: answers pre-rendered, and the curve."""

    key: str
    version: str
    curve: DemandCurve
    summary_json: bytes
    detail_json: bytes
    #: (inode, size, mtime_ns) of the file it was read from; a reload skips files
    #: whose stat is unchanged (the store replaces files by rename: a new inode)
    file_stat: tuple[int, int, int] = (0, 0, 0)

    @classmethod
    def from_artifact(cls, art: Artifact, *, file_stat: tuple[int, int, int] = (0, 0, 0)) -> ServedModel:
        described = art.describe()
        summary = {k: described[k] for k in ("model", "chosen", "rate_range", "coverage", "version", "trained_at")}
        detail = {
            **described,
            "band_m": to_millicores(art.curve.band),  # bounded by models.sanity: never huge
            "content_hash": art.content_hash,
        }
        return cls(
            art.key, art.version, art.demand_curve(), _compact_json(summary), _compact_json(detail), file_stat
        )


def _compact_json(value: object) -> bytes:
    # json, not orjson: orjson's output buffer keeps its over-allocation (~4 KB per
    # object, measured with tracemalloc), which adds up over 10,000 models
    return json.dumps(value, separators=(",", ":"), allow_nan=False).encode()


@dataclass(frozen=True)
class ServingSnapshot:
    """One loaded store; immutable once built."""

    models: Mapping[str, ServedModel]
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
        return len(self.models)


@dataclass(frozen=True)
class ReloadReport:
    ok: bool
    snapshot: ServingSnapshot | None
    #: version of the snapshot served before (the report does not hold the old
    #: snapshot itself, so that it can be freed as soon as the last request ends)
    previous_version: str | None
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


def build_snapshot(
    store: ModelStore, *, previous: ServingSnapshot | None = None, generation: int = 0
) -> ServingSnapshot:
    """Load every artifact of ``store`` into a new snapshot (see the module docstring).

    The checks are those of ``ModelStore.load_all`` (``ModelStore.load_entry``: only
    regular files, size cap, hash, schema, sane values, the key inside the file must
    match its place), one file at a time."""
    if not store.root.is_dir():
        raise StoreUnreadable(
            f"model store {str(store.root)!r} is not a directory: create it, or point --store at "
            "the directory `ratefit train` writes to"
        )
    started = time.monotonic()
    before = previous.models if previous is not None else {}
    models: dict[str, ServedModel] = {}
    refused: list[Refusal] = []
    failed: list[tuple[str, str, str, str]] = []
    for entry in store.entries():
        key = entry.key
        old = before.get(key) if key else None
        if entry.refusal is None and old is not None and old.file_stat == entry.file_stat:
            models[key] = old  # the very file read last time: nothing to verify again
            continue
        try:
            art, file_stat = store.load_entry(entry)
        except ArtifactRefused as exc:
            failed.append((entry.rel, key, str(exc), exc.reason))
            continue
        except (ArtifactError, OSError, ValueError, RecursionError) as exc:  # belt and braces: one file only
            failed.append((entry.rel, key, f"{entry.rel}: cannot be loaded ({type(exc).__name__})", "unreadable"))
            continue
        if old is not None and old.version == art.version:
            models[key] = dataclasses.replace(old, file_stat=file_stat)  # same content, rewritten
        else:
            models[key] = ServedModel.from_artifact(art, file_stat=file_stat)
        del art
    for rel, key, message, reason in failed:
        keep = bool(key) and key in before and key not in models
        if keep:
            models[key] = before[key]
        refused.append(Refusal(file=rel, error=message, kept_previous=keep, reason=reason))
    keys = sorted(models)
    bank = CurveBank({k: models[k].curve for k in keys})
    versions = tuple(models[k].version for k in keys)
    digest = hashlib.sha256()
    for k, v in zip(keys, versions):
        digest.update(f"{k}={v}\n".encode())
    return ServingSnapshot(
        models=MappingProxyType({k: models[k] for k in keys}),
        bank=bank,
        row_versions=versions,
        version=digest.hexdigest()[:12],
        loaded_at=time.time(),
        loaded_mono=started,
        refused=tuple(refused),
        generation=generation,
    )


def _release_free_memory() -> None:
    """Hand freed heap pages back to the OS (glibc ``malloc_trim``; a no-op elsewhere).
    Without it, RSS after a reload that changed every model stays at the level of two
    snapshots (measured: 185 MiB → 159 MiB with 10,000 models). ctypes releases the
    GIL during the call, so requests keep being served."""
    global _malloc_trim
    if _malloc_trim is None:
        try:
            import ctypes
            import ctypes.util

            name = ctypes.util.find_library("c")
            _malloc_trim = getattr(ctypes.CDLL(name), "malloc_trim", False) if name else False
        except OSError:
            _malloc_trim = False
    if _malloc_trim:
        _malloc_trim(0)


_malloc_trim: Any = None


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
                    previous_version=previous.version if previous is not None else None,
                    seconds=time.perf_counter() - started,
                    error=message,
                )
            if previous is not None and new.version == previous.version and new.refused == previous.refused:
                # nothing changed: keep serving the snapshot in place (no swap, no churn)
                return ReloadReport(
                    ok=True,
                    snapshot=previous,
                    previous_version=previous.version,
                    unchanged=len(previous),
                    seconds=time.perf_counter() - started,
                    refused=previous.refused,
                )
            self._generation += 1
            self._snapshot = new  # the swap: one reference assignment
            old = previous.models if previous is not None else {}
            previous_version = previous.version if previous is not None else None
            added = sum(1 for k in new.models if k not in old)
            removed = sum(1 for k in old if k not in new.models)
            changed = sum(1 for k, a in new.models.items() if k in old and old[k].version != a.version)
            unchanged = len(new.models) - added - changed
            del old, previous  # the old snapshot lives on only while requests still use it
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
            _release_free_memory()
            seconds = time.perf_counter() - started
        for r in new.refused:
            log.warning(
                "model refused (%s): %s%s",
                r.reason,
                r.error,
                " (the previous version keeps serving)" if r.kept_previous else "",
                extra={"event": "model_refused", "file": r.file, "reason": r.reason, "kept_previous": r.kept_previous},
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
            previous_version=previous_version,
            added=added,
            removed=removed,
            changed=changed,
            unchanged=unchanged,
            seconds=seconds,
            refused=new.refused,
        )
