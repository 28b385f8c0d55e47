"""Validation on time: blocked cross-validation (contiguous time blocks, optional gap),
the choice of scheme, the band from the scheme used, TrainOptions, and `train --cv`.

References: scikit-learn's ``KFold(shuffle=False)`` (contiguous folds of the given order)
and ``cross_val_score`` (scikit-learn docs, "Cross-validation: evaluating estimator
performance"); the blocked folds must be exactly those folds over time-sorted data.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from sklearn.model_selection import KFold, cross_val_score
from threadpoolctl import threadpool_limits

from ratefit.controller.cli import main
from ratefit.models.candidates import get_candidates
from ratefit.models.errors import InputError, NotEnoughData
from ratefit.models.options import CVScheme, TrainOptions
from ratefit.models.samples import Samples
from ratefit.models.select import blocked_folds, conformal_band, cross_validate, resolve_scheme, select
from ratefit.models.train import train_key_detailed


def _series(n: int, seed: int = 0, *, step: float = 60.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = 1_767_000_000 + step * np.arange(n)
    r = rng.uniform(0, 100, n)
    return t, r, 0.1 + 0.0003 * r**2 + rng.normal(0, 0.03, n)


@pytest.mark.parametrize("n, folds", [(10, 3), (11, 3), (10, 4), (97, 5), (1000, 7)])
def test_blocked_folds_equal_sklearn_kfold_unshuffled_on_time_order(n: int, folds: int) -> None:
    rng = np.random.default_rng(n)
    t = rng.permutation(np.arange(n) * 30.0)  # distinct times, rows out of time order
    order = np.argsort(t)
    ours = blocked_folds(t, folds)
    ref = list(KFold(n_splits=folds, shuffle=False).split(np.zeros((n, 1))))
    assert len(ours) == folds
    for (tr, te), (rtr, rte) in zip(ours, ref):
        assert sorted(te.tolist()) == sorted(order[rte].tolist())
        assert sorted(tr.tolist()) == sorted(order[rtr].tolist())


def test_blocks_are_contiguous_and_keep_equal_times_together() -> None:
    # three pods sampled at the same 30 s steps: rows of one step share a timestamp
    t = np.repeat(1_767_000_000 + 30.0 * np.arange(50), 3)
    folds = blocked_folds(t, 5)
    seen = np.zeros(t.size, dtype=int)
    last_end = -np.inf
    for tr, te in folds:
        seen[te] += 1
        assert t[te].min() > last_end  # block b+1 starts after block b ends
        last_end = t[te].max()
        assert not set(t[te]) & set(t[tr])  # a timestamp never sits on both sides
        assert te.size == 30  # 10 steps × 3 pods
    assert np.all(seen == 1)  # every row held out exactly once


def test_gap_leaves_out_training_rows_near_the_held_out_block() -> None:
    t = 60.0 * np.arange(100)
    for gap in (0.0, 60.0, 600.0):
        for tr, te in blocked_folds(t, 5, gap=gap):
            lo, hi = t[te].min(), t[te].max()
            near = (t[tr] > lo - gap) & (t[tr] < hi + gap)
            assert not near.any()
            # exactly the rows within the gap are gone, no more
            expected = np.count_nonzero(~((t > lo - gap) & (t < hi + gap)) & ~np.isin(np.arange(100), te))
            assert tr.size == expected
    # 600 s = 10 rows each side of a 20-row block
    tr, te = blocked_folds(t, 5, gap=600.0)[2]
    assert tr.size == 100 - 20 - 2 * 9
    with pytest.raises(NotEnoughData, match="gap"):
        blocked_folds(t, 2, gap=1e9)
    with pytest.raises(NotEnoughData, match="distinct timestamps"):
        blocked_folds(np.zeros(10), 3)


def test_blocked_cv_rmse_equals_cross_val_score_on_time_sorted_data() -> None:
    t, r, y = _series(600, seed=3)
    perm = np.random.default_rng(1).permutation(t.size)  # rows handed over out of order
    t, r, y = t[perm], r[perm], y[perm]
    (cand,) = get_candidates(["polynomial"])
    (ours,) = cross_validate(r, y, timestamps=t, candidates=[cand], folds=5, seed=7)
    o = np.argsort(t)
    with threadpool_limits(limits=1):
        ref = -cross_val_score(cand.build(7), r[o].reshape(-1, 1), y[o], cv=KFold(5, shuffle=False),
                               scoring="neg_root_mean_squared_error")
    assert ours.fold_rmse == pytest.approx(tuple(ref), rel=1e-9)


def test_shuffled_with_timestamps_is_the_old_shuffled_kfold() -> None:
    t, r, y = _series(400, seed=2)
    (cand,) = get_candidates(["linear"])
    (ours,) = cross_validate(r, y, timestamps=t, candidates=[cand], folds=5, seed=4, cv="shuffled")
    with threadpool_limits(limits=1):
        ref = -cross_val_score(cand.build(4), r.reshape(-1, 1), y, cv=KFold(5, shuffle=True, random_state=4),
                               scoring="neg_root_mean_squared_error")
    assert ours.fold_rmse == pytest.approx(tuple(ref), rel=1e-9)


def test_scheme_defaults_and_refusals() -> None:
    t = np.arange(100.0)
    assert resolve_scheme(None, t, folds=5) is CVScheme.BLOCKED
    assert resolve_scheme(None, None, folds=5) is CVScheme.SHUFFLED
    assert resolve_scheme(None, np.zeros(100), folds=5) is CVScheme.SHUFFLED  # one time: nothing to block
    assert resolve_scheme("shuffled", t, folds=5) is CVScheme.SHUFFLED
    with pytest.raises(InputError, match="needs timestamps"):
        resolve_scheme("blocked", None, folds=5)


def test_band_comes_from_the_scheme_used_and_both_are_recorded() -> None:
    t, r, y = _series(500, seed=5)
    cands = get_candidates(["fixed", "linear", "polynomial"])
    sel = select(r, y, timestamps=t, candidates=cands)
    assert sel.cv is CVScheme.BLOCKED
    assert sel.band == conformal_band(y - sel.chosen.oof, 0.95)
    comp = sel.comparison
    assert comp is not None and comp.scheme is CVScheme.SHUFFLED
    assert [s.name for s in comp.scores] == ["fixed", sel.chosen.name]
    assert comp.band == conformal_band(y - comp.scores[-1].oof, 0.95)
    assert set(sel.rmse_by_scheme(sel.chosen.name)) == {"blocked", "shuffled"}
    # the other way round, and no comparison without timestamps or when switched off
    assert select(r, y, timestamps=t, candidates=cands, cv="shuffled").comparison.scheme is CVScheme.BLOCKED
    assert select(r, y, candidates=cands).comparison is None
    assert select(r, y, timestamps=t, candidates=cands, compare_cv=False).comparison is None


def test_tuned_blocked_runs_nested_and_records_params() -> None:
    t, r, y = _series(300, seed=4)
    sel = select(r, y, timestamps=t, candidates=get_candidates(["linear", "polynomial"]), folds=3, tune=True,
                 compare_cv=False)
    assert sel.cv is CVScheme.BLOCKED and sel.chosen.name == "polynomial"
    assert sel.params["poly__degree"] in (2, 3)


def test_train_options_frozen_keyword_only_and_checked() -> None:
    o = TrainOptions(folds=3, cv="blocked")
    assert o.cv is CVScheme.BLOCKED
    with pytest.raises(dataclasses.FrozenInstanceError):
        o.folds = 4  # type: ignore[misc]
    with pytest.raises(TypeError):
        TrainOptions(3)  # type: ignore[misc]
    for bad, match in [({"folds": 1}, "folds"), ({"coverage": 1.0}, "coverage"), ({"cv": "random"}, "cv"),
                       ({"cv_gap": -1.0}, "gap"), ({"warmup": float("nan")}, "warm-up"),
                       ({"throttle_threshold": 2.0}, "throttle"), ({"candidates": []}, "candidates")]:
        with pytest.raises(InputError, match=match):
            TrainOptions(**bad)
    assert TrainOptions.of(o, seed=9) == TrainOptions(folds=3, cv="blocked", seed=9)
    assert TrainOptions.of(None) == TrainOptions()


def test_train_key_uses_the_samples_timestamps() -> None:
    t, r, y = _series(400, seed=6)
    res = train_key_detailed(Samples(rate=r, cpu=y, timestamp=t), key="t/time/app", warmup=0,
                             candidates=get_candidates(["fixed", "linear"]))
    assert res.cv is CVScheme.BLOCKED
    assert "blocked" in res.summary() and "shuffled" in res.summary()
    res = train_key_detailed(Samples(rate=r, cpu=y), key="t/time/app", candidates=get_candidates(["linear"]))
    assert res.cv is CVScheme.SHUFFLED and "shuffled used" in res.summary()


def _csv(path: Path, *, timestamps: bool) -> Path:
    t, r, y = _series(300, seed=8)
    head = "timestamp,rate,cpu" if timestamps else "rate,cpu"
    rows = [f"{int(a)},{b:.4f},{c:.5f}" if timestamps else f"{b:.4f},{c:.5f}" for a, b, c in zip(t, r, y)]
    path.write_text("\n".join([head, *rows]) + "\n")
    return path


def test_cli_cv_flag(tmp_path: Path, capsys) -> None:
    with_t = _csv(tmp_path / "t.csv", timestamps=True)
    no_t = _csv(tmp_path / "n.csv", timestamps=False)
    store = str(tmp_path / "store")
    assert main(["train", "--samples", str(with_t), "--key", "a/b/c", "--store", store, "--quiet",
                 "--report", str(tmp_path / "rep")]) == 0
    out = capsys.readouterr().out
    assert "chosen estimator" in out and "blocked used" in out and "shuffled" in out
    md = (tmp_path / "rep" / "a__b__c.md").read_text()
    assert "blocked in time" in md and "| estimator | RMSE blocked | RMSE shuffled |" in md
    assert main(["train", "--samples", str(with_t), "--key", "a/b/c", "--store", store, "--quiet",
                 "--cv", "shuffled"]) == 0
    assert "shuffled used" in capsys.readouterr().out
    assert main(["train", "--samples", str(no_t), "--key", "a/b/c", "--store", store, "--quiet",
                 "--cv", "blocked"]) == 2
    err = capsys.readouterr().err
    assert "needs timestamps" in err and "--cv shuffled" in err
    with pytest.raises(SystemExit) as exc:
        main(["train", "--samples", str(no_t), "--key", "a/b/c", "--store", store, "--cv", "random"])
    assert exc.value.code == 2
    assert "invalid choice" in capsys.readouterr().err
