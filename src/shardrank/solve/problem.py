"""The PageRank problem on a store: damping, teleport distribution and dead-end policy.

    r'[j] = d * sum_{i->j} w_ij / w_out(i) * r[i] + d * D * u[j] + (1 - d) * v[j]

with D the total score of dead ends and u = v (policy "teleport", strongly preferential) or
u = 1/N (policy "uniform", weakly preferential).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Teleport:
    """The teleport distribution: uniform when ``ids`` is None, else sparse (ids sorted, sum 1)."""

    n_nodes: int
    ids: np.ndarray | None = None
    values: np.ndarray | None = None

    @property
    def uniform(self) -> bool:
        return self.ids is None

    def dense(self) -> np.ndarray:
        """float64[N] (for tests and warm starts; the iteration never builds it)."""
        if self.ids is None:
            return np.full(self.n_nodes, 1.0 / self.n_nodes)
        v = np.zeros(self.n_nodes)
        assert self.values is not None
        v[self.ids] = self.values
        return v

    def fill_block(self, first: int, n_rows: int, out: np.ndarray) -> np.ndarray:
        """Write v[first:first + n_rows] into ``out[:n_rows]``; return that view."""
        view = out[:n_rows]
        view[:] = 0.0
        assert self.ids is not None and self.values is not None
        a, b = np.searchsorted(self.ids, [first, first + n_rows])
        view[self.ids[a:b] - first] = self.values[a:b]
        return view


@dataclass(frozen=True)
class Problem:
    damping: float
    teleport: Teleport
    dead_ends: str  # "teleport" | "uniform"

    def constants(self, dead_mass: float) -> tuple[float, float]:
        """(add_uniform, add_teleport) for the gather kernel, given the dead-end mass D."""
        d, n = self.damping, self.teleport.n_nodes
        if self.teleport.uniform:
            return ((1.0 - d) + d * dead_mass) / n, 0.0
        if self.dead_ends == "teleport":
            return 0.0, (1.0 - d) + d * dead_mass
        return d * dead_mass / n, 1.0 - d
