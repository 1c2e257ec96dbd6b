"""Plans are data: the ball cover and the task table of one run.

This module holds frozen, serialisable descriptions of the work (which rows a task owns,
which rows its halo holds, what it is expected to cost). It performs no I/O and knows
nothing of Dask or Zarr; the planner functions that fill these structures are pure.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True, eq=False)
class Cover:
    """A greedy ball cover of the points, already renumbered ball by ball.

    Attributes
    ----------
    radius : float
        Ball radius R (default: eps).
    order : int64[N]
        New row ``i`` is original row ``order[i]``.
    ball_offsets : int64[B+1]
        Ball ``b`` owns the new rows ``ball_offsets[b]:ball_offsets[b+1]``.
    centres : int64[B]
        New row id of each ball's centre.
    neighbour_offsets, neighbour_balls : int64[B+1], int64[...]
        CSR lists: the balls whose centres lie within ``2R + eps`` of ball ``b``'s centre
        (``b`` itself included). Every eps-neighbour of a point of ``b`` lies in them.
    """

    radius: float
    order: np.ndarray
    ball_offsets: np.ndarray
    centres: np.ndarray
    neighbour_offsets: np.ndarray
    neighbour_balls: np.ndarray

    @property
    def n_balls(self) -> int:
        return int(self.centres.shape[0])


@dataclass(frozen=True)
class Task:
    """One unit of work: the rows it owns and the halo its kernel reads."""

    index: int
    row_start: int
    row_stop: int
    halo: np.ndarray = field(repr=False)  # sorted new-row ids; includes the owned rows
    cost: float
    memory: int

    @property
    def n_owned(self) -> int:
        return self.row_stop - self.row_start


@dataclass(frozen=True, eq=False)
class Plan:
    """The task table of one run, columnar so that a million tasks stay cheap.

    Tasks are ordered heaviest first. Task ``i`` owns new rows
    ``row_start[i]:row_stop[i]`` (a contiguous range of the ball-sorted points) and its
    halo is ``halo_rows[halo_offsets[i]:halo_offsets[i+1]]``: sorted new-row ids of every
    point within eps of an owned row, the owned rows included.
    """

    eps: float
    max_dim: int | None
    cover_radius: float
    n_points: int
    dim: int
    row_start: np.ndarray
    row_stop: np.ndarray
    halo_offsets: np.ndarray
    halo_rows: np.ndarray
    cost: np.ndarray
    memory: np.ndarray
    n_edges: int = -1  # edges of the eps-graph, when the planner counted them

    @property
    def n_tasks(self) -> int:
        return int(self.row_start.shape[0])

    def task(self, i: int) -> Task:
        lo, hi = int(self.halo_offsets[i]), int(self.halo_offsets[i + 1])
        return Task(
            index=int(i),
            row_start=int(self.row_start[i]),
            row_stop=int(self.row_stop[i]),
            halo=self.halo_rows[lo:hi],
            cost=float(self.cost[i]),
            memory=int(self.memory[i]),
        )

    def halo_sizes(self) -> np.ndarray:
        return np.diff(self.halo_offsets)

    def replication(self) -> float:
        """Rows read by all tasks divided by the number of points."""
        return float(self.halo_offsets[-1]) / max(self.n_points, 1)

    def digest(self) -> str:
        """A content hash of the plan: names the task keys and guards the run store."""
        h = hashlib.sha256()
        head = {
            "eps": float(self.eps).hex(),
            "max_dim": self.max_dim,
            "cover_radius": float(self.cover_radius).hex(),
            "n_points": int(self.n_points),
            "dim": int(self.dim),
        }
        h.update(json.dumps(head, sort_keys=True).encode())
        for arr in (self.row_start, self.row_stop, self.halo_offsets, self.halo_rows):
            h.update(np.ascontiguousarray(arr, dtype="<i8").tobytes())
        return h.hexdigest()[:16]
