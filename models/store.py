"""The model store: one JSON artifact per container key, on a plain directory.

Layout: ``<root>/<namespace>/<workload>/<container>.json``. An artifact holds
everything needed to serve and to audit a demand curve (schema version, key,
curve and band, trained range, sample counts and drops by reason, the CV table,
the chosen model, the data window, library versions) and a content hash over all
of it. Loading is JSON only — nothing is ever unpickled — and refuses any file
whose hash, schema or shape does not check out, so a corrupt, truncated or
hand-edited artifact is never served. Writes go to a temporary file in the same
directory, are fsynced and renamed over the old file (atomic on POSIX), so a
reader sees the old or the new artifact, never half of one.

The served curve is tabulated (see ``models.curve``): serving needs no
scikit-learn, so the recorded library versions are provenance, not a load check;
the schema string is the load check.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ratefit.models.curve import DemandCurve
from ratefit.models.errors import ArtifactError, UnknownModel
from ratefit.models.keys import KEY_PATTERN, ModelKey, parse_key

SCHEMA = "ratefit.dev/demand-curve/v1"
HASH_PREFIX = "sha256:"

ParamValue = float | int | str | bool | None


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
    content_hash: str = ""

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
            "key": self.key,
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
            "window": self.window.model_dump(mode="json"),
            "cv": [row.model_dump(mode="json") for row in self.cv],
        }

    def to_json_dict(self) -> dict[str, Any]:
        return self.model_dump(mode="json", by_alias=True)

    def sealed(self) -> Artifact:
        """A copy with ``content_hash`` computed over everything else."""
        body = self.to_json_dict()
        body.pop("content_hash", None)
        return self.model_copy(update={"content_hash": content_hash(body)})


def content_hash(body: dict[str, Any]) -> str:
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return HASH_PREFIX + hashlib.sha256(canonical.encode()).hexdigest()


def parse_artifact(text: str | bytes, *, origin: str = "<artifact>") -> Artifact:
    """Parse and verify an artifact; ArtifactError says what is wrong and what to do."""
    fix = f"retrain the key with `ratefit train` or restore {origin} from a backup"
    try:
        raw = json.loads(text)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ArtifactError(f"{origin}: not valid JSON ({exc}); the file is corrupt or truncated: {fix}") from exc
    if not isinstance(raw, dict):
        raise ArtifactError(f"{origin}: expected a JSON object, got {type(raw).__name__}: {fix}")
    schema = raw.get("schema")
    if schema != SCHEMA:
        raise ArtifactError(f"{origin}: unknown schema {schema!r} (this ratefit reads {SCHEMA!r}): {fix}")
    stated = raw.get("content_hash")
    body = {k: v for k, v in raw.items() if k != "content_hash"}
    try:
        actual = content_hash(body)
    except ValueError as exc:  # NaN/Infinity in the file
        raise ArtifactError(f"{origin}: contains non-finite numbers: {fix}") from exc
    if stated != actual:
        raise ArtifactError(
            f"{origin}: content hash mismatch (file says {stated!r}, content is {actual!r}); "
            f"the file was edited or damaged after it was written: {fix}"
        )
    try:
        art = Artifact.model_validate(raw)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise ArtifactError(f"{origin}: field {where!r}: {first['msg']}: {fix}") from exc
    try:
        art.demand_curve()
    except ArtifactError as exc:
        raise ArtifactError(f"{origin}: {exc}: {fix}") from exc
    return art


@dataclass
class StoreLoad:
    """Everything found in a store: good artifacts by key, refusals by file."""

    artifacts: dict[str, Artifact] = field(default_factory=dict)
    errors: dict[str, str] = field(default_factory=dict)


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

    def load(self, key: str | ModelKey) -> Artifact:
        path = self.path_for(key)
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            raise UnknownModel(str(key)) from None
        art = parse_artifact(data, origin=str(path))
        if art.key != str(key):
            raise ArtifactError(f"{path}: holds key {art.key!r}, expected {str(key)!r}: the file was moved or copied")
        return art

    def files(self) -> Iterator[Path]:
        if not self.root.is_dir():
            return iter(())
        return iter(sorted(p for p in self.root.glob("*/*/*.json") if not p.name.startswith(".")))

    def keys(self) -> list[str]:
        return [f"{p.parent.parent.name}/{p.parent.name}/{p.stem}" for p in self.files()]

    def load_all(self) -> StoreLoad:
        """Load every artifact; a bad file is reported in ``errors`` and skipped."""
        out = StoreLoad()
        for path in self.files():
            rel = str(path.relative_to(self.root))
            expected = f"{path.parent.parent.name}/{path.parent.name}/{path.stem}"
            try:
                art = parse_artifact(path.read_bytes(), origin=str(path))
                if art.key != expected:
                    raise ArtifactError(f"{path}: holds key {art.key!r} but lies at the place of {expected!r}")
            except (ArtifactError, OSError) as exc:
                out.errors[rel] = str(exc)
                continue
            out.artifacts[art.key] = art
        return out
