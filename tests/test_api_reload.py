"""Reload under load, against a real ``ratefit serve`` process on loopback.

Two threads hammer ``POST /v1/demand`` (a batch over every key) and
``GET …/demand`` while the main thread rewrites every artifact of the store with a
new curve and calls ``POST /v1/reload``, ten times. Checked: no request fails; every
answer carries the old or the new version; a batch is answered from one snapshot
only (all its items from the same round); the numbers are those of the version
named. Then: a corrupt artifact is refused at reload, reported in the answer and in
the log, and the other models (and the last good version of that key) keep serving.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import httpx
import pytest
from api_fixtures import demo_keys, expected, make_artifact, serve_process

from ratefit.models.store import Artifact, ModelStore

N_KEYS = 60
ROUNDS = 10
TOKEN = "reload-suite-token"  # invented


def _slope(round_no: int) -> float:
    return 0.002 + 0.0005 * round_no


def _write_round(store: ModelStore, keys: list[str], round_no: int) -> dict[str, Artifact]:
    arts = {}
    for key in keys:
        art = make_artifact(key, slope=_slope(round_no), trained_at=f"2026-01-01T00:{round_no:02d}:00Z")
        store.save(art)
        arts[key] = art
    return arts


@pytest.mark.slow
def test_reload_under_load_never_fails_a_request(tmp_path: Path) -> None:
    root = tmp_path / "store"
    store = ModelStore(root)
    keys = demo_keys(N_KEYS)
    rounds: list[dict[str, Artifact]] = [_write_round(store, keys, 0)]
    version_round = {a.version: 0 for a in rounds[0].values()}
    completed = [0]  # reloads acknowledged by the server
    stop = threading.Event()
    failures: list[str] = []
    batches: list[tuple[int, int, dict]] = []
    singles: list[tuple[int, int, dict]] = []
    items = [{"model": k, "rate": float(i % 150)} for i, k in enumerate(keys)]

    def hammer_batch(base_url: str) -> None:
        with httpx.Client(base_url=base_url, headers={"Authorization": f"Bearer {TOKEN}"}, timeout=30) as c:
            while not stop.is_set():
                r0 = completed[0]
                try:
                    r = c.post("/v1/demand", json={"items": items})
                except httpx.HTTPError as exc:
                    failures.append(f"batch: {exc!r}")
                    continue
                if r.status_code != 200:
                    failures.append(f"batch: {r.status_code} {r.text[:200]}")
                    continue
                batches.append((r0, completed[0], r.json()))

    def hammer_single(base_url: str) -> None:
        with httpx.Client(base_url=base_url, headers={"Authorization": f"Bearer {TOKEN}"}, timeout=30) as c:
            i = 0
            while not stop.is_set():
                key = keys[i % len(keys)]
                i += 1
                r0 = completed[0]
                try:
                    r = c.get(f"/v1/models/{key}/demand", params={"rate": 42.0})
                except httpx.HTTPError as exc:
                    failures.append(f"single: {exc!r}")
                    continue
                if r.status_code != 200:
                    failures.append(f"single: {r.status_code} {r.text[:200]}")
                    continue
                singles.append((r0, completed[0], r.json()))

    with serve_process(root, token=TOKEN, workdir=tmp_path, log_level="warning") as srv:
        threads = [
            threading.Thread(target=hammer_batch, args=(srv.base_url,), daemon=True),
            threading.Thread(target=hammer_single, args=(srv.base_url,), daemon=True),
        ]
        for t in threads:
            t.start()
        try:
            with srv.client() as admin:
                for n in range(1, ROUNDS + 1):
                    time.sleep(0.05)
                    rounds.append(_write_round(store, keys, n))  # rewritten while the hammers run
                    version_round.update({a.version: n for a in rounds[n].values()})
                    rep = admin.post("/v1/reload")
                    assert rep.status_code == 200, rep.text
                    body = rep.json()
                    assert body["ok"] and body["changed"] == N_KEYS and body["refused"] == []
                    completed[0] = n
                time.sleep(0.1)
        finally:
            stop.set()
            for t in threads:
                t.join(timeout=30)

    assert failures == []
    assert len(batches) >= ROUNDS and len(singles) >= ROUNDS
    seen_rounds = set()
    memo: dict[tuple[int, str, float], dict] = {}

    def want(n: int, key: str, rate: float) -> dict:
        if (n, key, rate) not in memo:
            memo[(n, key, rate)] = expected(rounds[n][key], rate)
        return memo[(n, key, rate)]

    for r0, r1, body in batches:
        got = {version_round[it["version"]] for it in body["items"]}
        # one snapshot per batch: every item from the same round
        assert len(got) == 1, got
        (n,) = got
        # old or new: the round when the request started, or a later one up to the one
        # being swapped in when it ended
        assert r0 <= n <= r1 + 1, (r0, n, r1)
        seen_rounds.add(n)
        for it, want_item in zip(body["items"], items):
            assert it == want(n, it["model"], want_item["rate"])
    for r0, r1, body in singles:
        n = version_round[body["version"]]
        assert r0 <= n <= r1 + 1
        assert body == want(n, body["model"], 42.0)
    assert len(seen_rounds) >= 3, f"the hammer saw too few rounds to mean anything: {sorted(seen_rounds)}"


def test_corrupt_artifact_is_refused_and_the_rest_keep_serving(tmp_path: Path) -> None:
    root = tmp_path / "store"
    store = ModelStore(root)
    keys = demo_keys(5)
    v0 = _write_round(store, keys, 0)
    with serve_process(root, token=TOKEN, workdir=tmp_path) as srv, srv.client() as c:
        v1 = _write_round(store, keys[1:], 1)
        victim = store.path_for(keys[0])
        text = victim.read_text()
        victim.write_text(text.replace('"chosen": "linear"', '"chosen": "forest"'))  # edited: hash mismatch
        newcomer = "shop/new-one/app"
        store.save(make_artifact(newcomer))
        store.path_for(newcomer).write_text('{"schema": "ratefit.dev/demand-curve/v1", "key": "shop/new-')  # truncated

        r = c.post("/v1/reload")
        assert r.status_code == 200
        body = r.json()
        refused = {x["file"]: x for x in body["refused"]}
        assert set(refused) == {f"{keys[0]}.json", f"{newcomer}.json"}
        assert refused[f"{keys[0]}.json"]["kept_previous"] is True
        assert "hash mismatch" in refused[f"{keys[0]}.json"]["error"]
        assert refused[f"{newcomer}.json"]["kept_previous"] is False
        assert body["model_count"] == 5 and body["changed"] == 4
        assert refused[f"{keys[0]}.json"]["reason"] == "corrupt" and refused[f"{newcomer}.json"]["reason"] == "corrupt"
        # messages name the file inside the store, never the server's absolute path
        assert str(root) not in r.text

        # the others serve their new version; the damaged key its last good one; the new key none
        for k in keys[1:]:
            assert c.get(f"/v1/models/{k}/demand", params={"rate": 10}).json() == expected(v1[k], 10.0)
        assert c.get(f"/v1/models/{keys[0]}/demand", params={"rate": 10}).json() == expected(v0[keys[0]], 10.0)
        assert c.get(f"/v1/models/{newcomer}/demand", params={"rate": 10}).status_code == 404
        listed = c.get("/v1/models").json()
        assert {x["file"] for x in listed["refused"]} == set(refused)
        assert c.get("/readyz").json()["refused_count"] == 2

        # the store vanishes entirely: reload answers 503 and the old set keeps serving
        moved = tmp_path / "moved"
        root.rename(moved)
        try:
            gone = c.post("/v1/reload")
            assert gone.status_code == 503 and gone.json()["ok"] is False
            assert c.get(f"/v1/models/{keys[1]}/demand", params={"rate": 10}).json() == expected(v1[keys[1]], 10.0)
        finally:
            moved.rename(root)
        log = srv.log_text()

    records = [json.loads(line) for line in log.splitlines() if line.startswith("{")]
    refusals = [rec for rec in records if rec.get("event") == "model_refused"]
    assert {rec["file"] for rec in refusals} == set(refused)
    assert any(rec.get("event") == "reload_failed" and rec["level"] == "error" for rec in records)


def test_a_dropped_snapshot_leaves_no_reference_cycles(tmp_path: Path) -> None:
    # ApiState freezes the loaded set out of the garbage collector (gc.freeze); that is only
    # safe if an old snapshot is freed by reference counting alone, i.e. holds no cycles
    # (Python docs, gc module: objects in the permanent generation are ignored by collections).
    import gc

    from ratefit.models.api_state import ApiState, build_snapshot

    store = ModelStore(tmp_path / "store")
    _write_round(store, demo_keys(20), 0)
    gc.collect()
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        snap = build_snapshot(store)
        assert len(snap) == 20
        del snap
        assert gc.collect() == 0  # nothing unreachable that only the cycle collector could free
        state = ApiState(tmp_path / "store", freeze_gc=False)
        state.reload()
        _write_round(store, demo_keys(20), 1)
        gc.collect()  # whatever writing the artifacts left behind
        state.reload()  # builds the new snapshot and drops the old one
        assert gc.collect() == 0
    finally:
        if was_enabled:
            gc.enable()


def test_old_snapshots_are_freed_after_reloads(tmp_path: Path) -> None:
    # memory must not grow with every reload: once no request uses it, an old snapshot is
    # gone (with the GC freeze on, as served), including the one loaded at startup
    import weakref

    from fastapi.testclient import TestClient

    from ratefit.models.api import ApiSettings, create_app

    store = ModelStore(tmp_path / "store")
    keys = demo_keys(10)
    _write_round(store, keys, 0)
    app = create_app(ApiSettings(store=tmp_path / "store"))
    refs = []
    with TestClient(app) as c:
        for n in range(1, 4):
            refs.append(weakref.ref(app.state.api_state.snapshot.bank))
            _write_round(store, keys, n)
            assert c.post("/v1/reload").json()["changed"] == len(keys)
        alive = [r() is not None for r in refs]
        assert alive == [False, False, False]
        assert app.state.api_state.snapshot.generation == 4


def test_reload_interval_picks_up_new_artifacts(tmp_path: Path) -> None:
    from fastapi.testclient import TestClient

    from ratefit.models.api import ApiSettings, create_app

    store = ModelStore(tmp_path / "store")
    _write_round(store, demo_keys(2), 0)
    app = create_app(ApiSettings(store=tmp_path / "store", reload_interval=0.1))
    with TestClient(app) as c:
        assert len(c.get("/v1/models").json()["models"]) == 2
        newcomer = "shop/late-arrival/app"
        art = make_artifact(newcomer, slope=0.01)
        store.save(art)
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            r = c.get(f"/v1/models/{newcomer}/demand", params={"rate": 10})
            if r.status_code == 200:
                break
            time.sleep(0.05)
        assert r.status_code == 200 and r.json() == expected(art, 10.0)
    # the ticker was stopped with the app: no reload after the lifespan ended
    gen = app.state.api_state.snapshot.generation
    time.sleep(0.3)
    assert app.state.api_state.snapshot.generation == gen


def test_serve_cli_checks_the_reload_interval(tmp_path: Path) -> None:
    import subprocess

    from api_fixtures import RATEFIT

    (tmp_path / "store").mkdir()
    out = subprocess.run(
        [str(RATEFIT), "serve", "--store", str(tmp_path / "store"), "--reload-interval", "soon"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.returncode == 2 and "--reload-interval" in out.stderr
