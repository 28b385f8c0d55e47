"""cgroup figures for a CPU request/limit, checked against the Kubernetes docs and the
kubelet's and runtime's formulas (values from memory, marked so) and worked examples."""

from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from ratefit.controller.cgroup import (
    cfs_quota_us,
    cgroup_figures,
    cpu_max,
    cpu_shares,
    cpu_weight_linear,
    cpu_weight_log,
)


def test_shares_worked_examples():
    # Kubernetes docs, "Resource Management for Pods and Containers" (from memory): a request
    # of 1 CPU is 1024 shares, so 0.5 CPU is 512; kubelet MilliCPUToShares integer-divides.
    assert cpu_shares(1000) == 1024
    assert cpu_shares(500) == 512
    assert cpu_shares(250) == 256
    assert cpu_shares(100) == 102  # 100 × 1024 / 1000 = 102.4 → 102
    # kubelet MinShares = 2, MaxShares = 262144 (from memory; DESIGN.md "Kubernetes facts")
    assert cpu_shares(1) == 2  # 1.024 → 1 → clamped to 2
    assert cpu_shares(0) == 2
    assert cpu_shares(None) == 2
    assert cpu_shares(256_000) == 262144  # exactly the maximum
    assert cpu_shares(300_000) == 262144  # clamped


def test_quota_worked_examples():
    # Kubernetes docs (from memory): a limit of 250m is 25 ms of CPU time per 100 ms period.
    assert cfs_quota_us(250) == 25_000
    assert cfs_quota_us(1500) == 150_000
    assert cfs_quota_us(2000) == 200_000  # two cores' worth per period
    # kubelet MinQuotaPeriod = 1 ms (from memory): tiny limits are raised to 1000 µs
    assert cfs_quota_us(1) == 1_000
    assert cfs_quota_us(5) == 1_000
    assert cfs_quota_us(10) == 1_000
    assert cfs_quota_us(11) == 1_100
    assert cfs_quota_us(None) is None
    assert cpu_max(250) == "25000 100000"  # cgroup v2 cpu.max "<quota> <period>" (kernel docs cgroup-v2.rst)
    assert cpu_max(None) == "max 100000"
    assert cfs_quota_us(250, period_us=50_000) == 12_500


def test_weight_linear_endpoints_and_examples():
    # runtime's linear conversion: [2, 262144] shares → [1, 10000] weight (from memory)
    assert cpu_weight_linear(2) == 1
    assert cpu_weight_linear(262144) == 10000
    assert cpu_weight_linear(1024) == 39  # 1 + 1022 × 9999 // 262142 = 1 + 38
    assert cpu_weight_linear(0) == 0


def test_weight_log_anchors():
    # The log-scale conversion is built so that 2 → 1, 1024 → 100 (cgroup v2's default weight,
    # kernel docs cgroup-v2.rst: "cpu.weight ... default is 100") and 262144 → 10000.
    assert cpu_weight_log(2) == 1
    assert cpu_weight_log(1024) == 100
    assert cpu_weight_log(262144) == 10000
    assert cpu_weight_log(0) == 0


@given(st.integers(min_value=2, max_value=262143))
def test_weights_monotone_and_in_range(shares):
    # cgroup v2 cpu.weight range is [1, 10000] (kernel docs cgroup-v2.rst)
    for f in (cpu_weight_linear, cpu_weight_log):
        assert 1 <= f(shares) <= 10000
        assert f(shares) <= f(shares + 1)


@given(st.integers(min_value=1, max_value=10**7))
def test_shares_monotone(m):
    assert cpu_shares(m) <= cpu_shares(m + 1)


def test_figures_bundle():
    f = cgroup_figures(250, 500)
    assert (f.shares, f.quota_us, f.cpu_max) == (256, 50_000, "50000 100000")
    assert f.cores_per_period == 0.5
    assert f.weight_linear == cpu_weight_linear(256) and f.weight_log == cpu_weight_log(256)
    assert cgroup_figures(250, None).quota_us is None
