"""Model versions in the store (models/store.py) and `ratefit models versions|rollback`:
a replaced model is kept, never served, and can be made current again."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from ratefit.models.api_state import build_snapshot
from ratefit.models.curve import DemandCurve
from ratefit.models.errors import ArtifactError
from ratefit.models.store import MAX_VERSIONS, Artifact, CurveData, CVRow, DataWindow, ModelStore, parse_artifact

RATEFIT = Path(sys.executable).with_name("ratefit")
KEY = "shop/web/app"


def art(slope: float, *, image: str | None = None, key: str = KEY) -> Artifact:
    curve = DemandCurve.tabulate(lambda r: 0.05 + slope * r, rate_lo=0.0, rate_hi=20.0, band=0.02)
    return Artifact(
        key=key, chosen="linear", coverage=0.95, rate_range=(0.0, 20.0), curve=CurveData(**curve.to_dict()),
        samples=10, samples_total=10, dropped={}, cv=[CVRow(model="linear", rmse=0.01, mae=0.01, p95=0.02)],
        folds=5, seed=0, window=DataWindow(source="INVENTED test"), trained_at="2026-01-01T00:00:00Z", image=image,
    ).sealed()


def test_save_keeps_the_replaced_version_and_the_api_serves_only_the_current(tmp_path: Path) -> None:
    store = ModelStore(tmp_path)
    v1, v2 = art(0.01), art(0.014)
    store.save(v1)
    store.save(v1)  # same content: nothing to keep
    assert store.versions(KEY) == []
    store.save(v2)
    hist = store.versions(KEY)
    assert [a.version for _, a in hist] == [v1.version]
    assert store.load(KEY).version == v2.version
    # the sizing API's snapshot (models/api_state.build_snapshot) sees one model, the current one,
    # and refuses nothing: the history lives in a hidden directory it never walks
    snap = build_snapshot(store)
    assert list(snap.models) == [KEY] and snap.models[KEY].version == v2.version and snap.refused == ()
    assert store.keys() == [KEY]


def test_rollback_restores_and_can_itself_be_rolled_back(tmp_path: Path) -> None:
    store = ModelStore(tmp_path)
    v1, v2, v3 = art(0.01), art(0.012), art(0.014)
    for a in (v1, v2, v3):
        store.save(a)
    assert store.rollback(KEY).version == v2.version  # newest previous
    assert store.load(KEY).version == v2.version
    assert store.rollback(KEY, to=v1.version[:6]).version == v1.version
    assert store.load(KEY).version == v1.version
    assert {a.version for _, a in store.versions(KEY)} == {v1.version, v2.version, v3.version}
    with pytest.raises(ArtifactError, match="no stored version"):
        store.rollback(KEY, to="ffffffff")
    with pytest.raises(ArtifactError, match="too short"):
        store.rollback(KEY, to="ab")


def test_history_is_bounded_and_a_damaged_version_is_skipped(tmp_path: Path) -> None:
    store = ModelStore(tmp_path)
    for i in range(MAX_VERSIONS + 3):
        store.save(art(0.01 + 0.0005 * i))
    files = sorted(store.versions_dir(KEY).iterdir())
    assert len(files) == MAX_VERSIONS
    files[-1].write_text("{not json")
    assert len(store.versions(KEY)) == MAX_VERSIONS - 1


def test_image_is_optional_and_hashed_only_when_set(tmp_path: Path) -> None:
    plain, with_image = art(0.01), art(0.01, image="registry.example/kestrel/web:1.4.2")
    assert "image" not in plain.to_json_dict()  # the hash of an artifact without it is unchanged
    assert plain.version != with_image.version
    store = ModelStore(tmp_path)
    store.save(with_image)
    back = parse_artifact((tmp_path / "shop/web/app.json").read_bytes())
    assert back.image == "registry.example/kestrel/web:1.4.2"
    assert back.describe()["image"] == back.image


def test_cli_versions_and_rollback(tmp_path: Path) -> None:
    store = ModelStore(tmp_path / "store")
    v1, v2 = art(0.01), art(0.014)
    store.save(v1)
    store.save(v2)
    out = subprocess.run([str(RATEFIT), "models", "versions", KEY, "--store", str(store.root), "--output", "json"],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    body = json.loads(out.stdout)
    assert body["current"] == v2.version and [v["version"] for v in body["versions"]] == [v1.version]
    rb = subprocess.run([str(RATEFIT), "models", "rollback", KEY, "--store", str(store.root)],
                        capture_output=True, text=True, timeout=60)
    assert rb.returncode == 0, rb.stderr
    assert v1.version in rb.stdout
    assert store.load(KEY).version == v1.version
    bad = subprocess.run([str(RATEFIT), "models", "rollback", "shop/web/none", "--store", str(store.root)],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "no previous version" in bad.stderr and "Traceback" not in bad.stderr
