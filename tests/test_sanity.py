"""Physical bounds (models/sanity.py): absurd numbers are refused where they enter —
a training CSV row (file:line, through `ratefit train`), a stored curve at load.

Bounds: 1,024 cores per container (a request cannot exceed a node's allocatable CPU,
Kubernetes docs "Resource Management for Pods and Containers"; no node sold has more
cores: common practice, no source) and 1e9 req/s per pod (common practice, no source).
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from ratefit.controller.cli import main
from ratefit.models.curve import GRID_POINTS
from ratefit.models.errors import SampleFileError
from ratefit.models.samples import load_csv
from ratefit.models.sanity import MAX_CORES, MAX_RATE, BoundError, check_curve, check_sample


@pytest.mark.parametrize(
    "rate,cpu,words",
    [
        (1.0, 1e17, "cpu: 1e+17 is above the bound of 1024 cores"),
        (1.0, 1e308, "cpu: 1e+308 is above"),
        (1e12, 0.5, "rate: 1e+12 is above the bound of 1e+09 req/s"),
        (math.inf, 0.5, "rate: must be a finite number"),
        (1.0, -0.1, "cpu: must be >= 0"),
    ],
)
def test_check_sample_refuses_absurd_values(rate: float, cpu: float, words: str) -> None:
    with pytest.raises(BoundError) as info:
        check_sample(rate, cpu)
    assert words in str(info.value)


def test_check_sample_takes_the_bounds_and_missing_values() -> None:
    check_sample(MAX_RATE, MAX_CORES)
    check_sample(0.0, 0.0)
    check_sample(math.nan, 0.2)  # NaN is a missing value in models/samples.py: dropped there


def test_check_curve() -> None:
    good = dict(rate_lo=0.0, rate_hi=100.0, cpu=[0.1] * GRID_POINTS, band=0.02, grid_points=GRID_POINTS)
    check_curve(**good, rate_range=(0.0, 100.0))
    for change, words in [
        ({"cpu": [0.1] * (GRID_POINTS - 1)}, "grid values"),
        ({"band": math.inf}, "finite"),
        ({"rate_hi": 1e10}, "rate_hi"),
        ({"rate_lo": 100.0}, "below"),
    ]:
        with pytest.raises(BoundError, match=words):
            check_curve(**{**good, **change})
    with pytest.raises(BoundError, match="rate_range"):
        check_curve(**good, rate_range=(0.0, 99.0))


def _csv(path: Path, rows: list[str]) -> Path:
    path.write_text("rate,cpu\n" + "\n".join(rows) + "\n")
    return path


def test_a_training_file_with_an_absurd_row_names_file_and_line(tmp_path: Path, capsys) -> None:
    rows = [f"{r},{0.05 + 0.004 * r:.4f}" for r in range(1, 200)]
    rows[41] = "42,100000000000000000"  # 1e17 cores on line 43 (the header is line 1)
    csv = _csv(tmp_path / "absurd.csv", rows)
    with pytest.raises(SampleFileError) as info:
        load_csv(csv)
    assert f"{csv}:43:" in str(info.value) and "1024 cores" in str(info.value)
    rc = main(["train", "--samples", str(csv), "--key", "shop/absurd/app", "--store", str(tmp_path / "s")])
    err = capsys.readouterr().err
    assert rc == 2 and f"{csv}:43:" in err
    assert not (tmp_path / "s" / "shop" / "absurd" / "app.json").exists()


def test_millicore_conversion_saturates_never_wraps() -> None:
    """An int64 cast of 1e17 cores × 1000 would wrap to -9223372036854775808 (the C/numpy
    int64 range); the conversion saturates at 2**53 (every integer up to it exact in a float)."""
    import numpy as np

    from ratefit.models.curve import MAX_MILLICORES, CurveLookup, to_millicores
    from ratefit.models.errors import InputError

    huge = np.array([1e17, 1e308, np.inf, 0.4121])
    look = CurveLookup(demand=huge, upper=huge + 1.0, extrapolated=np.zeros(4, dtype=bool))
    demand_m, bound_m = look.millicores()
    assert demand_m.tolist() == [MAX_MILLICORES, MAX_MILLICORES, MAX_MILLICORES, 413]
    assert bound_m.min() > 0 and -(2**63) not in bound_m.tolist()
    assert to_millicores(1e17) == MAX_MILLICORES and to_millicores(0.4121) == 413
    with pytest.raises(InputError):
        to_millicores(math.inf)
