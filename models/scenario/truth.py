"""True CPU-vs-rate curves of the INVENTED Kestrel Post demo scenario.

INVENTED DATA: these curves describe no real system. Each is a function from the
request rate one pod serves (req/s) to the CPU it uses (cores), in one of five shapes:

* ``linear``  — U = base + slope·X (the Utilization Law U = X·S plus a fixed base;
  Denning & Buzen 1978).
* ``convex``  — U = base + slope·X + curvature·X² (superlinear: lock contention).
* ``concave`` — U = base + slope·X + ceiling·(1 − exp(−X/scale)) (saturating: a
  cache absorbs repeated work as the rate grows).
* ``step``    — U = base + slope·X + jump·[X > threshold] (a fixed extra cost above a
  threshold rate: a second worker pool is switched on).
* ``knee``    — U = base + slope·max(0, X − threshold) (flat until a knee, then
  linear: a batch window absorbs low load).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, replace

import numpy as np

__all__ = ["Shape", "Truth"]


class Shape(str, enum.Enum):
    LINEAR = "linear"
    CONVEX = "convex"
    CONCAVE = "concave"
    STEP = "step"
    KNEE = "knee"


@dataclass(frozen=True, slots=True)
class Truth:
    """A true demand curve (invented). Parameters unused by a shape stay 0."""

    shape: Shape
    base: float
    slope: float
    curvature: float = 0.0  # convex: cores per (req/s)²
    ceiling: float = 0.0  # concave: cores the saturating part tends to
    scale: float = 1.0  # concave: req/s at which the saturating part is 63% there
    threshold: float = 0.0  # step / knee: req/s
    jump: float = 0.0  # step: extra cores above the threshold

    def __call__(self, rate: np.ndarray | float) -> np.ndarray:
        x = np.asarray(rate, dtype=float)
        u = self.base + self.slope * x
        if self.shape is Shape.CONVEX:
            u = u + self.curvature * x * x
        elif self.shape is Shape.CONCAVE:
            u = u + self.ceiling * (1.0 - np.exp(-x / self.scale))
        elif self.shape is Shape.STEP:
            u = u + np.where(x > self.threshold, self.jump, 0.0)
        elif self.shape is Shape.KNEE:
            u = self.base + self.slope * np.maximum(0.0, x - self.threshold)
        return u

    def for_pod(self, rng: np.random.Generator, *, spread: float = 0.05) -> Truth:
        """This curve as one pod sees it: base and slope each off by a few percent
        (pods land on different nodes and CPU generations)."""
        fb, fs = 1.0 + spread * rng.standard_normal(2)
        return replace(self, base=self.base * float(fb), slope=self.slope * float(fs))
