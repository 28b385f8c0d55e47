"""The model store: one JSON artifact per container key, on a plain directory.

Layout: ``<root>/<namespace>/<workload>/<container>.json`` — the CURRENT model of each
key, the only files the sizing API serves. Versions: when ``save`` replaces a key's
artifact by one with other content, the replaced file is kept (hard-linked, else copied)
as ``<root>/.versions/<namespace>/<workload>/<container>/<archived-at>-<version>.json``
(a hidden directory: ``entries()`` never walks it, so history is never served);
``versions(key)`` lists them, ``rollback(key, to=…)`` makes one current again (and
archives the one it replaces). At most ``MAX_VERSIONS`` are kept per key. An artifact holds
everything needed to serve and to audit a demand curve (schema version, key,
curve and band, trained range, sample counts and drops by reason, the CV table,
the chosen model, the data window, library versions) and a content hash over all
of it. Loading is JSON only — nothing is ever unpickled — and refuses any file
whose hash, schema or shape does not check out, so a corrupt, truncated or
hand-edited artifact is never served. Writes go to a temporary file in the same
directory, are fsynced and renamed over the old file (atomic on POSIX), so a
reader sees the old or the new artifact, never half of one.

Hostile stores. Only regular files inside the store are read: the store is walked
with ``os.scandir`` without following symbolic links, and each file is opened relative
to its directory with ``O_NOFOLLOW | O_NONBLOCK`` and checked with ``fstat`` before a
byte is read, so a symlink (to an artifact outside the store, to ``/dev/zero``), a
FIFO, a device or a socket named ``*.json`` is refused without being opened for
reading or waited on. A file larger than ``MAX_ARTIFACT_BYTES`` (16 MiB; a real
artifact is about 17 KB) is refused before it is read. Every refusal carries a
``reason`` (``REFUSAL_REASONS``) that the sizing API logs and counts.

Sane values. After the hash and the schema, ``models.sanity.check_curve`` checks
the numbers: every grid value and the band finite and within ``[0, 1024]`` cores,
exactly ``GRID_POINTS`` grid values, ``0 <= rate_lo < rate_hi <= 1e9`` and
``rate_range`` equal to the curve's range.

The served curve is tabulated (see ``models.curve``): serving needs no
scikit-learn, so the recorded library versions are provenance, not a load check;
the schema string is the load check.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import stat as stat_mod
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ratefit.models.curve import GRID_POINTS, DemandCurve
from ratefit.models.errors import ArtifactError, UnknownModel
from ratefit.models.keys import KEY_PATTERN, ModelKey, is_key, parse_key
from ratefit.models.sanity import BoundError, check_curve

SCHEMA = "ratefit.dev/demand-curve/v1"
HASH_PREFIX = "sha256:"

ParamValue = float | int | str | bool | None

#: largest artifact file read (a real one is about 17 KB; the cap stops a huge or
#: endless file from filling the server's memory)
MAX_ARTIFACT_BYTES = 16 * 1024 * 1024

#: previous versions kept per key (the oldest are removed beyond this)
MAX_VERSIONS = 20
#: hidden directory of the store holding the previous versions
VERSIONS_DIR = ".versions"

#: why a file of the store was refused (the ``reason`` label of the API's metric)
REFUSAL_REASONS = (
    "not_regular_file",  # a symlink, FIFO, device, socket or directory named like an artifact
    "too_large",  # over MAX_ARTIFACT_BYTES
    "unreadable",  # an OS error while opening or reading it
    "corrupt",  # not JSON, wrong schema, content hash mismatch, wrong shape
    "absurd_values",  # numbers outside their physical bounds (models.sanity)
    "wrong_place",  # the key inside differs from its place in the store
)


class ArtifactRefused(ArtifactError):
    """An artifact file that is not served, with the ``reason`` it was refused for."""

    def __init__(self, message: str, *, reason: str) -> None:
        super().__init__(message)
        self.reason = reason


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class CurveData(_Strict):
    rate_lo: Annotated[float, Field(ge=0)]
    rate_hi: float
    cpu: Annotated[list[float], Field(min_length=2)]
    band: Annotated[float, Field(ge=0)]


class CVRow(_Strict):
    """One candidate's cross-validated errors (cores)."""

    model: str
    rmse: float
    mae: float
    p95: float
    fit_seconds: float = 0.0
    params: dict[str, ParamValue] = Field(default_factory=dict)


class DataWindow(_Strict):
    source: str
    start: str | None = None
    end: str | None = None
    step: str | None = None


class Artifact(_Strict):
    """The stored form of one learned demand curve (cores and req/s throughout)."""

    schema_: Literal["ratefit.dev/demand-curve/v1"] = Field(SCHEMA, alias="schema")
    key: Annotated[str, Field(pattern=KEY_PATTERN)]
    chosen: str
    coverage: Annotated[float, Field(gt=0, lt=1)]
    rate_range: tuple[float, float]
    curve: CurveData
    samples: Annotated[int, Field(ge=0)]
    samples_total: Annotated[int, Field(ge=0)]
    dropped: dict[str, int] = Field(default_factory=dict)
    cv: list[CVRow]
    folds: Annotated[int, Field(ge=2)]
    seed: int
    tuned: bool = False
    window: DataWindow
    trained_at: str
    library: dict[str, str] = Field(default_factory=dict)
    #: per-pod capacity, req/s: the highest rate one pod carries within its latency SLO
    #: (``ratefit profile``'s knee, recorded by ``ratefit train --capacity/--profile``);
    #: None when unmeasured — then the key is left out of the file (older artifacts
    #: and their content hashes stay as they were)
    capacity: Annotated[float, Field(gt=0, le=1e9, allow_inf_nan=False)] | None = None
    content_hash: str = ""
    #: the container image the samples came from (optional; the controller flags a model
    #: whose container now runs another image). Left out of the JSON when unset, so the
    #: hash of an artifact without it is what it always was.
    image: Annotated[str, Field(min_length=1, max_length=512)] | None = None

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    @property
    def version(self) -> str:
        """Short content hash: changes whenever anything in the artifact changes."""
        return self.content_hash[len(HASH_PREFIX) : len(HASH_PREFIX) + 12]

    @property
    def model_key(self) -> ModelKey:
        return parse_key(self.key)

    def demand_curve(self) -> DemandCurve:
        c = self.curve
        return DemandCurve(rate_lo=c.rate_lo, rate_hi=c.rate_hi, cpu=c.cpu, band=c.band)

    def describe(self) -> dict[str, Any]:
        """What the artifact says about itself, as plain JSON values (for `models show`
        and the API's model detail; each adds its own extras)."""
        return {
            "model": self.key,
            "chosen": self.chosen,
            "rate_range": [float(self.rate_range[0]), float(self.rate_range[1])],
            "coverage": self.coverage,
            "version": self.version,
            "trained_at": self.trained_at,
            "samples": self.samples,
            "samples_total": self.samples_total,
            "dropped": dict(self.dropped),
            "folds": self.folds,
            "seed": self.seed,
            "tuned": self.tuned,
            "window": self._window_shown(),
            "cv": [row.model_dump(mode="json") for row in self.cv],
            "capacity": self.capacity,
            **({"image": self.image} if self.image is not None else {}),
        }

    def _window_shown(self) -> dict[str, Any]:
        """The data window, with a training file named by its base name only (never the
        absolute path of the machine it was trained on)."""
        window = self.window.model_dump(mode="json")
        source = str(window.get("source") or "")
        kind, sep, rest = source.partition(":")
        if sep and kind == "csv" and rest:
            window["source"] = f"csv:{os.path.basename(rest)}"
        elif "/" in source and not source.startswith(("http://", "https://")):
            window["source"] = os.path.basename(source.rstrip("/"))
        return window

    def to_json_dict(self) -> dict[str, Any]:
        body = self.model_dump(mode="json", by_alias=True)
        if body.get("capacity") is None:
            body.pop("capacity", None)  # optional key: absent unless measured
        if body.get("image") is None:
            body.pop("image", None)
        return body

    def with_capacity(self, capacity: float | None) -> Artifact:
        """A re-sealed copy recording the per-pod ``capacity`` (req/s; None removes it)."""
        return self.model_copy(update={"capacity": capacity, "content_hash": ""}).sealed()

    def sealed(self) -> Artifact:
        """A copy with ``content_hash`` computed over everything else."""
        body = self.to_json_dict()
        body.pop("content_hash", None)
        return self.model_copy(update={"content_hash": content_hash(body)})


def content_hash(body: dict[str, Any]) -> str:
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return HASH_PREFIX + hashlib.sha256(canonical.encode()).hexdigest()


def parse_artifact(text: str | bytes, *, origin: str = "<artifact>") -> Artifact:
    """Parse and verify an artifact; ArtifactRefused says what is wrong, what to do, and
    the ``reason``. ``origin`` names the file in messages (callers pass the path inside
    the store, never an absolute path that a client of the API would see)."""
    fix = f"retrain the key with `ratefit train` or restore {origin} from a backup"

    def refuse(message: str, reason: str = "corrupt") -> ArtifactRefused:
        return ArtifactRefused(f"{origin}: {message}: {fix}", reason=reason)

    try:
        raw = json.loads(text)
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError) as exc:
        raise refuse(f"not valid JSON ({type(exc).__name__}); the file is corrupt or truncated") from exc
    if not isinstance(raw, dict):
        raise refuse(f"expected a JSON object, got {type(raw).__name__}")
    schema = raw.get("schema")
    if schema != SCHEMA:
        raise refuse(f"unknown schema (this ratefit reads {SCHEMA!r})")
    stated = raw.get("content_hash")
    body = {k: v for k, v in raw.items() if k != "content_hash"}
    try:
        actual = content_hash(body)
    except ValueError as exc:  # NaN/Infinity (or 1e999) in the file
        raise refuse("contains non-finite numbers", "absurd_values") from exc
    if stated != actual:
        raise refuse(
            "content hash mismatch (the stated hash is not the content's); "
            "the file was edited or damaged after it was written"
        )
    try:
        art = Artifact.model_validate(raw)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise refuse(f"field {where!r}: {first['msg']}") from exc
    c = art.curve
    try:
        check_curve(
            rate_lo=c.rate_lo, rate_hi=c.rate_hi, cpu=c.cpu, band=c.band,
            grid_points=GRID_POINTS, rate_range=art.rate_range,
        )
    except BoundError as exc:
        raise refuse(str(exc), "absurd_values") from exc
    if art.samples > art.samples_total or any(v < 0 for v in art.dropped.values()):
        raise refuse("samples: more used than in total, or a negative drop count", "absurd_values")
    try:
        art.demand_curve()
    except ArtifactError as exc:
        raise refuse(str(exc), "absurd_values") from exc
    return art


@dataclass(frozen=True)
class StoreEntry:
    """One artifact-like name found in the store: where it lies, the key its place
    names, its lstat, and — when it must not be read — why."""

    rel: str
    key: str
    file_stat: tuple[int, int, int] = (0, 0, 0)
    refusal: ArtifactRefused | None = None


_OPEN_FLAGS = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0)
_DIR_FLAGS = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


def _kind(mode: int) -> str:
    if stat_mod.S_ISLNK(mode):
        return "a symbolic link"
    if stat_mod.S_ISFIFO(mode):
        return "a FIFO"
    if stat_mod.S_ISCHR(mode) or stat_mod.S_ISBLK(mode):
        return "a device"
    if stat_mod.S_ISSOCK(mode):
        return "a socket"
    if stat_mod.S_ISDIR(mode):
        return "a directory"
    return "not a regular file"


def _not_regular(rel: str, what: str) -> ArtifactRefused:
    return ArtifactRefused(
        f"{rel}: is {what}, not a regular file; only regular files inside the store are read: "
        "replace it with the artifact itself (`ratefit train` writes one)",
        reason="not_regular_file",
    )


def _stat_tuple(st: os.stat_result) -> tuple[int, int, int]:
    return (st.st_ino, st.st_size, st.st_mtime_ns)


@dataclass
class StoreLoad:
    """Everything found in a store: good artifacts by key, refusals by file."""

    artifacts: dict[str, Artifact] = field(default_factory=dict)
    errors: dict[str, str] = field(default_factory=dict)
    #: the refusal reason per refused file (see ``REFUSAL_REASONS``)
    reasons: dict[str, str] = field(default_factory=dict)


class ModelStore:
    """A directory of artifacts. All paths come from validated keys."""

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)

    def path_for(self, key: str | ModelKey) -> Path:
        k = key if isinstance(key, ModelKey) else parse_key(str(key))
        return self.root / k.namespace / k.workload / f"{k.container}.json"

    def save(self, artifact: Artifact) -> Path:
        """Seal (hash) and write atomically; returns the path written."""
        sealed = artifact if artifact.content_hash else artifact.sealed()
        path = self.path_for(sealed.key)
        path.parent.mkdir(parents=True, exist_ok=True)
        self._archive_current(sealed)
        data = json.dumps(sealed.to_json_dict(), indent=1, sort_keys=True, allow_nan=False) + "\n"
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        except BaseException:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
            raise
        try:
            dfd = os.open(path.parent, os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
        except OSError:  # pragma: no cover - platforms without directory fsync
            pass
        return path

    # -- versions ------------------------------------------------------------------
    def versions_dir(self, key: str | ModelKey) -> Path:
        k = key if isinstance(key, ModelKey) else parse_key(str(key))
        return self.root / VERSIONS_DIR / k.namespace / k.workload / k.container

    def _archive_current(self, new: Artifact) -> None:
        """Keep the key's current file (if any, and if its content differs from ``new``)."""
        path = self.path_for(new.key)
        try:
            current = self.load(new.key)
        except (UnknownModel, ArtifactError):
            return  # nothing (good) to keep: a refused file is not history
        if current.content_hash == new.content_hash:
            return
        d = self.versions_dir(new.key)
        d.mkdir(parents=True, exist_ok=True)
        stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime()) + f".{time.time_ns() % 1_000_000_000:09d}Z"
        dest = d / f"{stamp}-{current.version}.json"
        try:
            os.link(path, dest)
        except OSError:
            shutil.copyfile(path, dest)
        for old in self._version_files(new.key)[:-MAX_VERSIONS]:
            old.unlink(missing_ok=True)

    def _version_files(self, key: str | ModelKey) -> list[Path]:
        d = self.versions_dir(key)
        if not d.is_dir():
            return []
        return sorted(p for p in d.iterdir() if p.name.endswith(".json") and not p.name.startswith(".")
                      and p.is_file() and not p.is_symlink())

    def versions(self, key: str | ModelKey) -> list[tuple[str, Artifact]]:
        """The key's previous versions, oldest first: (archived-at stamp, artifact).
        Files that do not verify are left out."""
        k = key if isinstance(key, ModelKey) else parse_key(str(key))
        out = []
        for p in self._version_files(k):
            try:
                art = parse_artifact(p.read_bytes(), origin=f"{VERSIONS_DIR}/{k}/{p.name}")
            except (ArtifactError, OSError):
                continue
            if art.key == str(k):
                out.append((p.name.split("-", 1)[0], art))
        return out

    def rollback(self, key: str | ModelKey, *, to: str | None = None) -> Artifact:
        """Make a previous version current again: ``to`` a version (or a prefix of at
        least 4 characters of one), None: the newest previous version whose content
        differs from the current one. The replaced model is archived in turn. Returns the
        artifact now current. ArtifactError when there is nothing to restore."""
        k = key if isinstance(key, ModelKey) else parse_key(str(key))
        try:
            current_version = self.load(k).version
        except (UnknownModel, ArtifactError):
            current_version = None
        history = self.versions(k)
        if to is not None:
            if len(to) < 4:
                raise ArtifactError(f"version {to!r} is too short: give at least 4 characters of it "
                                    "(`ratefit models versions` lists them)")
            found = [a for _, a in history if a.version.startswith(to)]
            if not found:
                raise ArtifactError(f"{k} has no stored version {to!r}; `ratefit models versions {k}` lists them")
            art = found[-1]
        else:
            older = [a for _, a in history if a.version != current_version]
            if not older:
                raise ArtifactError(f"{k} has no previous version to roll back to (the store keeps the versions `ratefit train` replaced)")
            art = older[-1]
        self.save(art)
        return art

    def load(self, key: str | ModelKey) -> Artifact:
        k = key if isinstance(key, ModelKey) else parse_key(str(key))
        rel = f"{k.namespace}/{k.workload}/{k.container}.json"
        try:
            data, _ = self.read(rel)
        except FileNotFoundError:
            raise UnknownModel(str(k)) from None
        except OSError as exc:
            if exc.errno in (errno.ENOTDIR, errno.ELOOP):
                raise _not_regular(rel, "reached through a symbolic link") from None
            raise ArtifactRefused(f"{rel}: cannot read it ({exc.strerror or exc})", reason="unreadable") from exc
        # the CLI's own lookup: the full path helps the person at the terminal
        art = parse_artifact(data, origin=str(self.root / rel))
        if art.key != str(k):
            raise ArtifactRefused(
                f"{rel}: holds another key than its place names: the file was moved or copied", reason="wrong_place"
            )
        return art

    def read(self, rel: str, *, max_bytes: int = MAX_ARTIFACT_BYTES) -> tuple[bytes, tuple[int, int, int]]:
        """The bytes of the regular file at ``rel`` (``ns/workload/container.json``) and
        its (inode, size, mtime_ns). No component is followed if it is a symbolic link;
        a FIFO or device is refused without waiting; at most ``max_bytes`` are read.
        Raises ArtifactRefused (reason ``not_regular_file``/``too_large``) or OSError."""
        parts = rel.split("/")
        dfd = os.open(self.root, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_CLOEXEC", 0))
        try:
            for part in parts[:-1]:
                nfd = os.open(part, _DIR_FLAGS, dir_fd=dfd)
                os.close(dfd)
                dfd = nfd
            try:
                fd = os.open(parts[-1], _OPEN_FLAGS, dir_fd=dfd)
            except OSError as exc:
                if exc.errno == errno.ELOOP:  # O_NOFOLLOW on a symlink
                    raise _not_regular(rel, "a symbolic link") from None
                raise
        finally:
            os.close(dfd)
        try:
            st = os.fstat(fd)
            if not stat_mod.S_ISREG(st.st_mode):
                raise _not_regular(rel, _kind(st.st_mode))
            if st.st_size > max_bytes:
                raise ArtifactRefused(
                    f"{rel}: {st.st_size} bytes, over the {max_bytes}-byte cap for an artifact "
                    "(a real one is a few tens of KB): remove it or retrain the key",
                    reason="too_large",
                )
            chunks: list[bytes] = []
            size = 0
            while True:
                chunk = os.read(fd, 1 << 20)
                if not chunk:
                    break
                size += len(chunk)
                if size > max_bytes:
                    raise ArtifactRefused(f"{rel}: grew over the {max_bytes}-byte cap while read", reason="too_large")
                chunks.append(chunk)
            return b"".join(chunks), _stat_tuple(st)
        finally:
            os.close(fd)

    def entries(self) -> list[StoreEntry]:
        """Every ``<ns>/<workload>/<container>.json`` name in the store, sorted, walked
        without following symbolic links. A name that is not a regular file is returned
        with its refusal (and never opened); a symlinked directory is refused as a
        whole. Hidden names (temporary files of ``save``) are skipped."""
        out: list[StoreEntry] = []
        if not self.root.is_dir():
            return out

        def scan(path: Path, *, must: bool = False) -> list[os.DirEntry[str]]:
            try:
                with os.scandir(path) as it:
                    return sorted((e for e in it if not e.name.startswith(".")), key=lambda e: e.name)
            except OSError:
                if must:  # the store itself cannot be listed: the caller keeps what it has
                    raise
                return []

        for ns in scan(self.root, must=True):
            if not ns.is_dir(follow_symlinks=False):
                if ns.is_symlink():
                    out.append(StoreEntry(ns.name, "", refusal=_not_regular(ns.name, "a symbolic link to a directory")))
                continue
            for wl in scan(Path(ns.path)):
                rel_wl = f"{ns.name}/{wl.name}"
                if not wl.is_dir(follow_symlinks=False):
                    if wl.is_symlink():
                        out.append(StoreEntry(rel_wl, "", refusal=_not_regular(rel_wl, "a symbolic link to a directory")))
                    continue
                for f in scan(Path(wl.path)):
                    if not f.name.endswith(".json"):
                        continue
                    rel = f"{rel_wl}/{f.name}"
                    key = f"{rel_wl}/{f.name[: -len('.json')]}"
                    try:
                        st = f.stat(follow_symlinks=False)
                    except OSError as exc:
                        out.append(StoreEntry(rel, key, refusal=ArtifactRefused(
                            f"{rel}: cannot stat it ({exc.strerror or exc})", reason="unreadable")))
                        continue
                    if not stat_mod.S_ISREG(st.st_mode):
                        out.append(StoreEntry(rel, key, refusal=_not_regular(rel, _kind(st.st_mode))))
                        continue
                    out.append(StoreEntry(rel, key, file_stat=_stat_tuple(st)))
        return out

    def files(self) -> Iterator[Path]:
        """Paths of the regular artifact files (refused names left out)."""
        return iter([self.root / e.rel for e in self.entries() if e.refusal is None])

    def keys(self) -> list[str]:
        return [e.key for e in self.entries() if e.refusal is None]

    def load_entry(self, entry: StoreEntry) -> tuple[Artifact, tuple[int, int, int]]:
        """Read and verify one entry of ``entries()``; ArtifactRefused (with its reason)
        for anything that must not be served."""
        if entry.refusal is not None:
            raise entry.refusal
        try:
            data, file_stat = self.read(entry.rel)
        except ArtifactRefused:
            raise
        except OSError as exc:
            if exc.errno in (errno.ENOTDIR, errno.ELOOP):
                raise _not_regular(entry.rel, "reached through a symbolic link") from None
            raise ArtifactRefused(f"{entry.rel}: cannot read it ({exc.strerror or exc})", reason="unreadable") from exc
        art = parse_artifact(data, origin=entry.rel)
        if art.key != entry.key or not is_key(entry.key):
            raise ArtifactRefused(
                f"{entry.rel}: holds another key than its place in the store names: the file was moved or "
                "copied; move it back or retrain the key",
                reason="wrong_place",
            )
        return art, file_stat

    def load_all(self) -> StoreLoad:
        """Load every artifact; a bad file is reported in ``errors`` and skipped."""
        out = StoreLoad()
        for entry in self.entries():
            try:
                art, _ = self.load_entry(entry)
            except ArtifactRefused as exc:
                out.errors[entry.rel] = str(exc)
                out.reasons[entry.rel] = exc.reason
                continue
            out.artifacts[art.key] = art
        return out
