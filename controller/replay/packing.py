"""How many nodes hold a set of pods: first-fit decreasing bin packing.

Each pod needs the sum of its containers' CPU requests (millicores, integers, so no
float rounding decides a fit); a node offers ``node_m`` allocatable millicores. First fit
decreasing (Johnson 1973; Garey & Johnson, "Computers and Intractability", 1979): sort
the pods by request, largest first, and put each on the first node it fits on, opening a
new node when none has room. It uses at most 11/9·OPT + 6/9 nodes (Dósa 2007). A pod
larger than a node can be placed nowhere: it is counted on a node of its own and reported
in ``oversized``. Requests decide placement (the scheduler's view), never usage.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["Packing", "first_fit_decreasing", "NodeCounter"]


@dataclass(frozen=True)
class Packing:
    nodes: int
    #: per node the millicores requested on it, in the order nodes were opened
    loads: tuple[int, ...]
    oversized: int = 0


def first_fit_decreasing(requests_m: Sequence[int] | np.ndarray, node_m: int) -> Packing:
    """Pack pods of ``requests_m`` millicores onto nodes of ``node_m`` millicores."""
    if node_m <= 0:
        raise ValueError(f"a node needs a positive CPU capacity, got {node_m}m")
    sizes = np.sort(np.asarray(requests_m, dtype=np.int64))[::-1]
    free = np.empty(len(sizes) + 1, dtype=np.int64)
    used = 0
    oversized = 0
    loads: list[int] = []
    for s in sizes.tolist():
        if s > node_m:
            oversized += 1
            loads.append(s)
            free[used] = -1  # nothing else fits beside it
            used += 1
            continue
        if used:
            fits = np.flatnonzero(free[:used] >= s)
            if fits.size:
                i = int(fits[0])
                free[i] -= s
                loads[i] += s
                continue
        free[used] = node_m - s
        loads.append(s)
        used += 1
    return Packing(nodes=used, loads=tuple(loads), oversized=oversized)


class NodeCounter:
    """Node counts for many steps, remembering packings already done: between changes the
    same multiset of pod requests recurs, and packing it again would give the same answer."""

    def __init__(self, node_m: int) -> None:
        self.node_m = node_m
        self._seen: dict[bytes, Packing] = {}

    def count(self, requests_m: np.ndarray) -> Packing:
        key = np.sort(np.asarray(requests_m, dtype=np.int64)).tobytes()
        got = self._seen.get(key)
        if got is None:
            got = first_fit_decreasing(requests_m, self.node_m)
            self._seen[key] = got
        return got
