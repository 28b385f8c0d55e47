"""Hostile and absurd store files against a real `ratefit serve` (issue 9, items 2 and 4).

One bad file harms only itself: the server starts, the good models keep serving with
no 4xx/5xx, the bad file is refused with a log line (``"event": "model_refused"``) and
counted in ``ratefit_api_models_refused{reason}`` — at start-up and on reload. Nothing
blocks on a FIFO, reads ``/dev/zero`` or follows a link out of the store, and SIGTERM
still stops the server gracefully (exit by the signal, not by the fixture's SIGKILL).

The bounds come from ``models/sanity.py`` (1,024 cores, 1e9 req/s); int64's range
(-9223372036854775808 … 9223372036854775807) is the C/numpy integer type's.
"""

from __future__ import annotations

import json
import os
import signal
from collections.abc import Callable
from pathlib import Path

import httpx
import pytest
from api_fixtures import expected, make_artifact, serve_process, write_store

from ratefit.models.curve import GRID_POINTS
from ratefit.models.store import MAX_ARTIFACT_BYTES, ArtifactRefused, ModelStore, content_hash

GOOD = ["shop/good-a/app", "shop/good-b/app", "bank/good-c/side"]  # invented scenario
INT64_MIN = -(2**63)


def _resealed(store: ModelStore, key: str, edit: Callable[[dict], None]) -> Path:
    """Write the artifact of ``key`` with ``edit`` applied and a hash that matches again:
    the file is 'undamaged' — only its numbers are absurd."""
    path = store.save(make_artifact(key))
    raw = json.loads(path.read_text())
    edit(raw)
    raw.pop("content_hash")
    try:
        raw["content_hash"] = content_hash(raw)
    except ValueError:  # non-finite numbers cannot be hashed: keep the old hash
        raw["content_hash"] = "sha256:" + "0" * 64
    path.write_text(json.dumps(raw, allow_nan=True))
    return path


def _set_cpu(value: float) -> Callable[[dict], None]:
    def edit(raw: dict) -> None:
        raw["curve"]["cpu"] = [value] * len(raw["curve"]["cpu"])

    return edit


ABSURD: dict[str, tuple[Callable[[dict], None], str]] = {
    "shop/cpu-1e17/app": (_set_cpu(1e17), "absurd_values"),
    "shop/cpu-1e308/app": (_set_cpu(1e308), "absurd_values"),
    "shop/band-inf/app": (lambda raw: raw["curve"].__setitem__("band", float("inf")), "absurd_values"),
    "shop/band-1e308/app": (lambda raw: raw["curve"].__setitem__("band", 1e308), "absurd_values"),
    "shop/short-grid/app": (lambda raw: raw["curve"].__setitem__("cpu", raw["curve"]["cpu"][:100]), "absurd_values"),
    "shop/rate-1e300/app": (
        lambda raw: (raw["curve"].__setitem__("rate_hi", 1e300), raw.__setitem__("rate_range", [0.0, 1e300])),
        "absurd_values",
    ),
    "shop/range-differs/app": (lambda raw: raw.__setitem__("rate_range", [0.0, 9999.0]), "absurd_values"),
    "shop/negative/app": (_set_cpu(-1.0), "absurd_values"),
}


def _hostile(root: Path, outside: Path) -> dict[str, str]:
    """Plant hostile names in the store; returns {file inside the store: expected reason}."""
    d = root / "shop" / "hostile"
    d.mkdir(parents=True, exist_ok=True)
    os.symlink(outside / "shop" / "elsewhere" / "app.json", d / "outside.json")  # a valid artifact, outside
    os.symlink("/dev/zero", d / "zero.json")
    os.mkfifo(d / "x.json")
    with open(d / "huge.json", "wb") as fh:  # sparse: takes no disk
        fh.truncate(MAX_ARTIFACT_BYTES + 1)
    (root / "linked").symlink_to(outside / "shop", target_is_directory=True)  # a namespace that is a link
    return {
        "shop/hostile/outside.json": "not_regular_file",
        "shop/hostile/zero.json": "not_regular_file",
        "shop/hostile/x.json": "not_regular_file",
        "shop/hostile/huge.json": "too_large",
        "linked": "not_regular_file",
    }


@pytest.fixture()
def stores(tmp_path: Path) -> tuple[Path, Path]:
    root, outside = tmp_path / "store", tmp_path / "outside"
    write_store(root, len(GOOD), keys=GOOD)
    ModelStore(outside).save(make_artifact("shop/elsewhere/app"))
    return root, outside


def _refused_metric(text: str) -> dict[str, float]:
    out = {}
    for line in text.splitlines():
        if line.startswith("ratefit_api_models_refused{"):
            reason = line.split('reason="', 1)[1].split('"', 1)[0]
            out[reason] = float(line.rsplit(" ", 1)[1])
    return out


def _check_serving(c: httpx.Client, arts: dict) -> None:
    """Every good model answers (single and batch) exactly as its own curve says."""
    for key in GOOD:
        r = c.get(f"/v1/models/{key}/demand", params={"rate": 50})
        assert r.status_code == 200 and r.json() == expected(arts[key], 50.0)
    items = [{"model": k, "rate": r} for k in GOOD + list(ABSURD) for r in (0.0, 50.0, 1e6)]
    r = c.post("/v1/demand", json={"items": items})
    assert r.status_code == 200
    for item, ans in zip(items, r.json()["items"]):
        if item["model"] in GOOD and "error" not in ans:
            assert ans == expected(arts[item["model"]], item["rate"])
        for v in (ans.get("demand_m"), ans.get("demand_bound_m")):
            assert v is None or 0 <= v < 2**53  # never wrapped to INT64_MIN
        if item["model"] in ABSURD:
            assert ans["reason"] == "unknown_model"  # refused at load: not served at all
    assert str(INT64_MIN) not in r.text


def test_absurd_and_hostile_files_at_startup_refused_one_by_one(stores: tuple[Path, Path]) -> None:
    root, outside = stores
    store = ModelStore(root)
    for key, (edit, _) in ABSURD.items():
        _resealed(store, key, edit)
    hostile = _hostile(root, outside)
    arts = {k: store.load(k) for k in GOOD}
    with serve_process(root, workdir=root.parent, ready_timeout=60) as srv, srv.client() as c:
        ready = c.get("/readyz").json()
        assert ready["model_count"] == len(GOOD)
        listed = c.get("/v1/models").json()
        refused = {x["file"]: x for x in listed["refused"]}
        want = {f"{k}.json": reason for k, (_, reason) in ABSURD.items()} | hostile
        assert {f: x["reason"] for f, x in refused.items()} == want
        assert {m["model"] for m in listed["models"]} == set(GOOD)  # the one outside is not served
        for x in refused.values():  # never the server's absolute paths
            assert str(root) not in x["error"] and str(outside) not in x["error"]
        metric = _refused_metric(c.get("/metrics").text)
        assert metric["absurd_values"] == len(ABSURD)
        assert metric["not_regular_file"] == 4 and metric["too_large"] == 1
        _check_serving(c, arts)
        # a reload sees the same files again: still no hang, the same refusals
        rel = c.post("/v1/reload")
        assert rel.status_code == 200 and rel.json()["model_count"] == len(GOOD)
        code = srv.stop()
    assert code in (0, -signal.SIGTERM)  # stopped by SIGTERM, not killed after the grace period
    records = [json.loads(line) for line in srv.log_text().splitlines() if line.startswith("{")]
    logged = {r["file"]: r["reason"] for r in records if r.get("event") == "model_refused"}
    assert logged == want


def test_hostile_files_on_reload_keep_the_last_good_version(stores: tuple[Path, Path]) -> None:
    root, outside = stores
    store = ModelStore(root)
    arts = {k: store.load(k) for k in GOOD}
    with serve_process(root, workdir=root.parent) as srv, srv.client() as c:
        # the good file of GOOD[0] is replaced by absurd numbers, GOOD[1]'s by a FIFO
        _resealed(store, GOOD[0], _set_cpu(1e17))
        victim = store.path_for(GOOD[1])
        victim.unlink()
        os.mkfifo(victim)
        _hostile(root, outside)
        rel = c.post("/v1/reload")
        assert rel.status_code == 200
        body = rel.json()
        by_file = {x["file"]: x for x in body["refused"]}
        assert by_file[f"{GOOD[0]}.json"]["reason"] == "absurd_values"
        assert by_file[f"{GOOD[0]}.json"]["kept_previous"] is True
        assert by_file[f"{GOOD[1]}.json"]["reason"] == "not_regular_file"
        assert by_file[f"{GOOD[1]}.json"]["kept_previous"] is True
        _check_serving(c, arts)  # the last good versions answer
        code = srv.stop()
    assert code in (0, -signal.SIGTERM)


def test_the_cli_lookup_refuses_the_same_files(stores: tuple[Path, Path]) -> None:
    root, outside = stores
    store = ModelStore(root)
    _hostile(root, outside)
    for key, (edit, reason) in ABSURD.items():
        _resealed(store, key, edit)
        with pytest.raises(ArtifactRefused) as info:
            store.load(key)
        assert info.value.reason == reason
    for name in ("outside", "zero", "x", "huge"):
        with pytest.raises(ArtifactRefused):
            store.load(f"shop/hostile/{name}")
    with pytest.raises(ArtifactRefused, match="symbolic link"):
        store.load("linked/elsewhere/app")  # through the linked namespace directory
    loaded = store.load_all()
    assert set(loaded.artifacts) == set(GOOD)


def test_grid_points_are_what_this_version_writes() -> None:
    # the check above ("short-grid") relies on every artifact having GRID_POINTS values
    assert len(make_artifact("shop/x/app").curve.cpu) == GRID_POINTS
