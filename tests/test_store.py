"""The model store: sealed artifacts, refusals of damaged files, atomic writes."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

from ratefit.models.errors import ArtifactError, UnknownModel
from ratefit.models.samples import Samples
from ratefit.models.store import ModelStore, parse_artifact
from ratefit.models.train import train_key

KEY = "shop/web/app"


@pytest.fixture(scope="module")
def artifact():
    rng = np.random.default_rng(0)
    r = rng.uniform(1, 40, 300)
    from ratefit.models.candidates import get_candidates

    return train_key(Samples(rate=r, cpu=0.05 + 0.01 * r + rng.normal(0, 0.01, r.size)), key=KEY,
                     candidates=get_candidates(["fixed", "linear", "isotonic"]))


def test_round_trip(tmp_path: Path, artifact) -> None:
    store = ModelStore(tmp_path)
    path = store.save(artifact)
    assert path == tmp_path / "shop" / "web" / "app.json"
    back = store.load(KEY)
    assert back == artifact and back.content_hash.startswith("sha256:")
    assert store.keys() == [KEY]
    with pytest.raises(UnknownModel, match="ratefit train"):
        store.load("shop/web/other")


def test_corrupt_truncated_edited_refused(tmp_path: Path, artifact) -> None:
    store = ModelStore(tmp_path)
    path = store.save(artifact)
    good = path.read_text()
    cases = {
        "garbage": ("\x00\x01 not json", "not valid JSON"),
        "truncated": (good[: len(good) // 2], "not valid JSON"),
        "edited": (good.replace(f'"chosen": "{artifact.chosen}"', '"chosen": "forest"'), "content hash mismatch"),
        "array": ("[1, 2]", "expected a JSON object"),
        "schema": (good.replace("ratefit.dev/demand-curve/v1", "ratefit.dev/demand-curve/v9"), "unknown schema"),
    }
    # a hand edit of a curve value that also keeps the hash consistent is still refused when
    # the curve is no longer non-decreasing (validation after the hash)
    raw = json.loads(good)
    raw["curve"]["cpu"][5] = raw["curve"]["cpu"][6] + 1.0
    from ratefit.models.store import content_hash

    raw.pop("content_hash")
    raw["content_hash"] = content_hash(raw)
    cases["non-monotone"] = (json.dumps(raw), "non-decreasing")
    for name, (text, words) in cases.items():
        path.write_text(text)
        with pytest.raises(ArtifactError, match=words) as info:
            store.load(KEY)
        assert str(path) in str(info.value) and "retrain" in str(info.value), name
        loaded = store.load_all()
        assert loaded.artifacts == {} and list(loaded.errors) == ["shop/web/app.json"], name


def test_moved_artifact_refused(tmp_path: Path, artifact) -> None:
    store = ModelStore(tmp_path)
    src = store.save(artifact)
    dst = tmp_path / "shop" / "web" / "other.json"
    dst.write_bytes(src.read_bytes())
    with pytest.raises(ArtifactError, match="moved or copied"):
        store.load("shop/web/other")
    assert set(store.load_all().errors) == {"shop/web/other.json"}


def test_atomic_write_leaves_no_temp_files(tmp_path: Path, artifact, monkeypatch) -> None:
    store = ModelStore(tmp_path)
    store.save(artifact)
    store.save(artifact)
    d = tmp_path / "shop" / "web"
    assert sorted(p.name for p in d.iterdir()) == ["app.json"]
    before = (d / "app.json").read_bytes()

    def boom(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError, match="disk full"):
        store.save(artifact.model_copy(update={"chosen": "isotonic", "content_hash": ""}))
    # the failed write left the old artifact whole and no temporary file behind
    assert sorted(p.name for p in d.iterdir()) == ["app.json"]
    assert (d / "app.json").read_bytes() == before
    assert parse_artifact(before).key == KEY


def test_model_detail_shows_the_training_file_by_base_name(tmp_path: Path) -> None:
    """Issue 9: the model detail never shows the absolute path of the machine that trained."""
    from api_fixtures import make_artifact
    from fastapi.testclient import TestClient

    from ratefit.models.api import ApiSettings, create_app
    from ratefit.models.store import DataWindow

    art = make_artifact("shop/web/app").model_copy(
        update={"window": DataWindow(source="csv:/home/alice/private/kestrel-post/web.csv"), "content_hash": ""}
    )
    ModelStore(tmp_path / "store").save(art)
    assert art.describe()["window"]["source"] == "csv:web.csv"
    with TestClient(create_app(ApiSettings(store=tmp_path / "store"))) as c:
        r = c.get("/v1/models/shop/web/app")
        assert r.status_code == 200 and r.json()["window"]["source"] == "csv:web.csv"
        assert "/home/alice" not in r.text
        missing = c.get("/v1/nothing/here/secret-part")
        assert missing.status_code == 404 and "secret-part" not in missing.text
