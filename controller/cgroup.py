"""What the kernel gets for a CPU request and limit: cgroup figures for the review.

Formulas (DESIGN.md "Kubernetes facts"; the kubelet's ``MilliCPUToShares`` and
``MilliCPUToQuota`` in pkg/kubelet/cm, and the OCI runtime's shares → weight
conversion for cgroup v2 — from memory, confirmed by the Kubernetes docs' statement
that a request of 1 CPU maps to 1024 shares):

- cgroup v1 ``cpu.shares`` = request_m × 1024 / 1000 (integer division), clamped to
  [2, 262144]; no request → 2.
- CFS quota (v1 ``cpu.cfs_quota_us``, v2 first field of ``cpu.max``) =
  limit_m × period / 1000 µs with period 100 000 µs, at least 1000 µs (1 ms);
  no limit → unlimited (v1 −1, v2 ``max``).
- cgroup v2 ``cpu.weight`` from shares, older runtimes (linear):
  1 + (shares − 2) × 9999 / 262142; newer runtimes (log-scale, chosen so that
  1024 shares → weight 100, the cgroup v2 default):
  ceil(10 ** ((l² + 125 l) / 612 − 7/34)) with l = log2(shares), 2 → 1, 262144 → 10000.

Pure integer arithmetic; nothing here touches a cgroup.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = [
    "MIN_SHARES",
    "MAX_SHARES",
    "CFS_PERIOD_US",
    "MIN_QUOTA_US",
    "cpu_shares",
    "cfs_quota_us",
    "cpu_max",
    "cpu_weight_linear",
    "cpu_weight_log",
    "CgroupFigures",
    "cgroup_figures",
]

MIN_SHARES = 2
MAX_SHARES = 262144
SHARES_PER_CPU = 1024
CFS_PERIOD_US = 100_000
MIN_QUOTA_US = 1_000


def cpu_shares(request_m: int | None) -> int:
    """cgroup v1 cpu.shares for a CPU request in millicores (None/0 → the minimum, 2)."""
    if not request_m:
        return MIN_SHARES
    shares = request_m * SHARES_PER_CPU // 1000
    return max(MIN_SHARES, min(MAX_SHARES, shares))


def cfs_quota_us(limit_m: int | None, *, period_us: int = CFS_PERIOD_US) -> int | None:
    """CFS quota in µs per ``period_us`` for a CPU limit; None means unlimited."""
    if not limit_m:
        return None
    return max(MIN_QUOTA_US, limit_m * period_us // 1000)


def cpu_max(limit_m: int | None, *, period_us: int = CFS_PERIOD_US) -> str:
    """cgroup v2 ``cpu.max`` content: ``"<quota> <period>"`` or ``"max <period>"``."""
    quota = cfs_quota_us(limit_m, period_us=period_us)
    return f"{'max' if quota is None else quota} {period_us}"


def cpu_weight_linear(shares: int) -> int:
    """cgroup v2 cpu.weight from shares, the older linear mapping ([2, 262144] → [1, 10000])."""
    if shares == 0:
        return 0
    return 1 + (shares - 2) * 9999 // 262142


def cpu_weight_log(shares: int) -> int:
    """cgroup v2 cpu.weight from shares, the newer log-scale mapping (1024 → 100)."""
    if shares == 0:
        return 0
    if shares <= MIN_SHARES:
        return 1
    if shares >= MAX_SHARES:
        return 10000
    l = math.log2(shares)  # noqa: E741
    exponent = (l * l + 125 * l) / 612.0 - 7.0 / 34.0
    return int(math.ceil(10**exponent - 1e-9))


@dataclass(frozen=True)
class CgroupFigures:
    shares: int
    weight_linear: int
    weight_log: int
    quota_us: int | None  # None: no CFS quota (no limit)
    period_us: int
    cpu_max: str

    @property
    def cores_per_period(self) -> float | None:
        """The limit as cores of CPU time per period (quota / period)."""
        return None if self.quota_us is None else self.quota_us / self.period_us


def cgroup_figures(request_m: int | None, limit_m: int | None, *, period_us: int = CFS_PERIOD_US) -> CgroupFigures:
    shares = cpu_shares(request_m)
    quota = cfs_quota_us(limit_m, period_us=period_us)
    return CgroupFigures(
        shares=shares,
        weight_linear=cpu_weight_linear(shares),
        weight_log=cpu_weight_log(shares),
        quota_us=quota,
        period_us=period_us,
        cpu_max=cpu_max(limit_m, period_us=period_us),
    )
