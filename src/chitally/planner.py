"""The planner: from a ball cover to a task table with exact halos, costs and memory.

`make_plan` counts every point's eps-neighbours through the cover's neighbour balls,
turns the counts into a cost per row, cuts the ball-sorted rows into contiguous tasks of
roughly equal cost (grouping neighbouring balls, splitting heavy ones), and gives every
task its exact halo: the rows within eps of an owned row. `summarise_plan` reduces a
plan to the figures a user checks before a run. Every edge decision goes through the one
distance rule of :mod:`chitally.metric`, so a halo holds exactly the rows the kernel
will meet. Pure functions: no I/O, no Dask, no Zarr.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numba as nb
import numpy as np

from chitally.metric import (
    distance_key,
    metric_tag,
    query_radius,
    validate_metric,
    within_key,
)
from chitally.plan import Cover, Plan

__all__ = [
    "DEFAULT_MAX_TASK_ROWS",
    "DEFAULT_MIN_TASKS",
    "DEFAULT_TASK_ROWS",
    "make_plan",
    "summarise_plan",
]

# Default task size. The target cost of a task is
#     max(total_cost / DEFAULT_MIN_TASKS, total_cost * DEFAULT_TASK_ROWS / N)
# i.e. at least the cost of an average slice of DEFAULT_TASK_ROWS rows (smaller tasks
# read proportionally more halo: measured 1.04x to 2.5x replication at 10^4 to 10^5 rows,
# far more for one ball per task), and at most 1/256 of the whole so a large run has
# enough tasks to balance a cluster and to show progress. No task owns more than
# `max_task_rows` rows (default DEFAULT_MAX_TASK_ROWS) so its halo stays a bounded read.
DEFAULT_MIN_TASKS = 256
DEFAULT_TASK_ROWS = 10_000
DEFAULT_MAX_TASK_ROWS = 100_000


@nb.njit(parallel=True, cache=True)
def _degrees(x, ball_offsets, centre_xyz, nb_offsets, nb_balls, reach, eps, tag):
    """Eps-neighbour counts of every row (exact rule, coincident points included).

    Returns (deg, up): all neighbours, and those with a larger row id (the edges the row
    owns). Only the row's ball's neighbour balls are scanned, and of those only the
    balls whose centre is within R + eps of the row (triangle inequality, widened to
    `reach`).
    """
    n_balls = ball_offsets.shape[0] - 1
    deg = np.zeros(x.shape[0], dtype=np.int64)
    up = np.zeros(x.shape[0], dtype=np.int32)
    for b in nb.prange(n_balls):
        for i in range(ball_offsets[b], ball_offsets[b + 1]):
            below = 0
            above = 0
            for t in range(nb_offsets[b], nb_offsets[b + 1]):
                other = nb_balls[t]
                if not within_key(distance_key(x, i, centre_xyz, other, tag), reach, tag):
                    continue
                for j in range(ball_offsets[other], ball_offsets[other + 1]):
                    if within_key(distance_key(x, i, x, j, tag), eps, tag):
                        if j < i:
                            below += 1
                        elif j > i:
                            above += 1
            deg[i] = below + above
            up[i] = above
    return deg, up


@nb.njit(nogil=True, cache=True)
def _push(buf, n, value):
    """buf[n] = value, doubling buf first when it is full; returns the buffer."""
    if n == buf.shape[0]:
        bigger = np.empty(2 * n, dtype=buf.dtype)
        bigger[:n] = buf
        buf = bigger
    buf[n] = value
    return buf


@nb.njit(nogil=True, cache=True)
def _cut_tasks(ball_offsets, row_cost, target, max_rows):
    """Contiguous task boundaries: start rows, in row order.

    Walk the balls in order, grouping whole balls while the task stays within `target`
    cost and `max_rows` rows; a ball heavier than either alone is cut by rows, and its
    last piece goes on collecting the next balls.
    """
    n_balls = ball_offsets.shape[0] - 1
    # Grown by doubling: a bound of one task per row would cost a row-sized array.
    starts = np.empty(1024, dtype=np.int64)
    n_tasks = 0
    cur_start = 0
    cur_cost = 0.0
    for b in range(n_balls):
        r0 = ball_offsets[b]
        r1 = ball_offsets[b + 1]
        ball_cost = 0.0
        for i in range(r0, r1):
            ball_cost += row_cost[i]
        if ball_cost > target or r1 - r0 > max_rows:
            if r0 > cur_start:
                starts = _push(starts, n_tasks, cur_start)
                n_tasks += 1
            s = r0
            c = 0.0
            for i in range(r0, r1):
                if i > s and (c + row_cost[i] > target or i - s >= max_rows):
                    starts = _push(starts, n_tasks, s)
                    n_tasks += 1
                    s = i
                    c = 0.0
                c += row_cost[i]
            cur_start = s
            cur_cost = c
            continue
        if r0 > cur_start and (cur_cost + ball_cost > target or r1 - cur_start > max_rows):
            starts = _push(starts, n_tasks, cur_start)
            n_tasks += 1
            cur_start = r0
            cur_cost = 0.0
        cur_cost += ball_cost
    starts = _push(starts, n_tasks, cur_start)
    n_tasks += 1
    return starts[:n_tasks].copy()


@nb.njit(nogil=True, cache=True)
def _ball_of_row(ball_offsets, row):
    return np.searchsorted(ball_offsets, row, side="right") - 1


@nb.njit(nogil=True, cache=True)
def _task_halo(x, ball_offsets, centre_xyz, nb_offsets, nb_balls, row_start, row_stop, reach, eps, tag):
    """Exact halo of the task owning rows row_start..row_stop-1: the sorted rows within
    eps of an owned row, the owned rows included.

    Candidates are the rows of the owned balls' neighbour balls. A ball whose every
    neighbour ball is owned whole by the task cannot reach outside it, so its rows are
    not scanned at all: for a compact task that skips most of the interior.
    """
    b0 = _ball_of_row(ball_offsets, row_start)
    b1 = _ball_of_row(ball_offsets, row_stop - 1)
    first_whole = b0 if ball_offsets[b0] >= row_start else b0 + 1
    last_whole = b1 if ball_offsets[b1 + 1] <= row_stop else b1 - 1
    border = np.zeros(b1 - b0 + 1, dtype=np.bool_)
    n_listed = b1 - b0 + 1
    for b in range(b0, b1 + 1):
        lo = nb_offsets[b]
        hi = nb_offsets[b + 1]
        # lists are sorted: the first and last entries bound the whole list
        if nb_balls[lo] < first_whole or nb_balls[hi - 1] > last_whole:
            border[b - b0] = True
            n_listed += hi - lo
    listed = np.empty(n_listed, dtype=np.int64)
    k = 0
    for b in range(b0, b1 + 1):
        listed[k] = b
        k += 1
        if border[b - b0]:
            for t in range(nb_offsets[b], nb_offsets[b + 1]):
                listed[k] = nb_balls[t]
                k += 1
    cand = np.unique(listed)  # sorted, so candidate rows come out sorted too
    cand_base = np.empty(cand.shape[0] + 1, dtype=np.int64)
    cand_base[0] = 0
    for k in range(cand.shape[0]):
        b = cand[k]
        cand_base[k + 1] = cand_base[k] + ball_offsets[b + 1] - ball_offsets[b]
    mark = np.zeros(cand_base[-1], dtype=np.bool_)
    own0 = np.searchsorted(cand, b0)
    for i in range(row_start, row_stop):
        mark[cand_base[own0] + i - ball_offsets[b0]] = True
    for b in range(b0, b1 + 1):
        if not border[b - b0]:
            continue
        near = nb_balls[nb_offsets[b] : nb_offsets[b + 1]]
        where = np.searchsorted(cand, near)
        i0 = max(row_start, ball_offsets[b])
        i1 = min(row_stop, ball_offsets[b + 1])
        for i in range(i0, i1):
            for t in range(near.shape[0]):
                other = near[t]
                if not within_key(distance_key(x, i, centre_xyz, other, tag), reach, tag):
                    continue
                base = cand_base[where[t]]
                j0 = ball_offsets[other]
                for j in range(j0, ball_offsets[other + 1]):
                    if within_key(distance_key(x, i, x, j, tag), eps, tag):
                        mark[base + j - j0] = True
    n_halo = 0
    for k in range(mark.shape[0]):
        if mark[k]:
            n_halo += 1
    halo = np.empty(n_halo, dtype=np.int64)
    h = 0
    for k in range(cand.shape[0]):
        b = cand[k]
        j0 = ball_offsets[b]
        for j in range(j0, ball_offsets[b + 1]):
            if mark[cand_base[k] + j - j0]:
                halo[h] = j
                h += 1
    return halo


def _row_cost(deg: np.ndarray, max_dim: int | None) -> np.ndarray:
    """The cost model: float64 cost of each row from its eps-degree (see `make_plan`).

    ``d**2 + 1``, or ``d + 1`` when ``max_dim <= 1``. Costs are integers below 2**53, so
    every sum of them is exact in float64.
    """
    row_cost = np.asarray(deg).astype(np.float64)
    if max_dim is None or max_dim > 1:
        row_cost *= row_cost
    row_cost += 1.0
    return row_cost


def _task_memory(halo_rows, dim: int, halo_edges, owned_edges, max_degree):
    """The memory model: estimated peak bytes of a task's kernel (see `make_plan`).

    Works elementwise on int64 arrays or on Python ints.
    """
    return (
        halo_rows * (dim * 8 + 8)
        + halo_edges * 24
        + owned_edges * 16
        + 2 * ((max_degree * max_degree + 7) // 8)
    )


def _validate(x: np.ndarray, cover: Cover, eps: float, max_dim: int | None) -> None:
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 1:
        raise ValueError(f"points_sorted must be a non-empty (N, m) array, got shape {x.shape}")
    if int(cover.ball_offsets[-1]) != x.shape[0] or cover.order.shape[0] != x.shape[0]:
        raise ValueError(
            f"the cover holds {int(cover.ball_offsets[-1])} rows but points_sorted has {x.shape[0]}"
        )
    if not (np.isfinite(eps) and eps > 0):
        raise ValueError(f"eps must be finite and > 0, got {eps!r}")
    if max_dim is not None and max_dim < 0:
        raise ValueError(f"max_dim must be >= 0 or None, got {max_dim!r}")


def make_plan(
    points_sorted: np.ndarray,
    cover: Cover,
    eps: float,
    max_dim: int | None,
    *,
    task_cost: float | None = None,
    max_task_rows: int | None = None,
    metric: str = "euclidean",
) -> Plan:
    """Cut the ball-sorted rows into tasks with exact halos, heaviest first.

    Parameters
    ----------
    points_sorted : ndarray of float64, shape (N, m)
        The points in the cover's new order, ``points[cover.order]``.
    cover : Cover
        From :func:`chitally.cover.build_cover` with this ``eps``.
    eps : float
        The Vietoris-Rips scale (> 0); must be the ``eps`` the cover was built for (its
        neighbour balls reach ``2R + eps``).
    max_dim : int or None
        Simplex dimension cap, or None for uncapped; only changes the cost model.
    task_cost : float, optional
        Target cost of a task. Default: ``max(total / DEFAULT_MIN_TASKS,
        total * DEFAULT_TASK_ROWS / N)`` (see the module constants for why).
    max_task_rows : int, optional
        Most rows a task may own; default ``DEFAULT_MAX_TASK_ROWS`` (100,000).
    metric : {"euclidean", "manhattan", "chebyshev"}
        The metric of every distance; the cover must have been built in it.

    Returns
    -------
    Plan
        Tasks own contiguous row ranges that partition ``0..N-1``, ordered by decreasing
        cost (ties by ``row_start``). A task's halo is exactly the sorted rows within eps
        (by ``metric.within_key``) of one of its rows, its own rows included.

    Notes
    -----
    Cost of a row with degree d: ``d**2 + 1`` (the kernel's frame build, quadratic in
    the degree, dominates), or ``d + 1`` when ``max_dim <= 1`` (only edges are counted).
    The ``+ 1`` is the per-row work of reading and relabelling; it also keeps isolated
    points from being free, so a cloud without edges still gets sensible tasks.

    ``memory`` is an *estimate* in bytes of the kernel's peak for the task, not a
    measurement: ``halo_rows * (8 m + 8)`` (coordinates and ids) ``+ halo_edges * 24``
    (an adjacency CSR with lengths; ``halo_edges`` is the sum of the halo rows' degrees,
    an upper bound of what the halo graph holds) ``+ owned_edges * 16`` (the jump table
    output; edges whose lower endpoint is owned) ``+ 2 * ceil(max_degree**2 / 8)`` (two
    bitset frames for the densest owned row).

    Examples
    --------
    >>> import numpy as np
    >>> from chitally.cover import build_cover
    >>> from chitally.planner import make_plan
    >>> pts = np.random.default_rng(0).random((2000, 2))
    >>> cover = build_cover(pts, eps=0.05)
    >>> plan = make_plan(pts[cover.order], cover, 0.05, max_dim=2)
    >>> int(plan.row_stop.max())
    2000
    """
    x = np.ascontiguousarray(points_sorted, dtype=np.float64)
    eps = float(eps)
    _validate(x, cover, eps, max_dim)
    n, dim = x.shape
    if max_task_rows is None:
        max_task_rows = DEFAULT_MAX_TASK_ROWS
    if int(max_task_rows) < 1:
        raise ValueError(f"max_task_rows must be >= 1, got {max_task_rows!r}")
    max_task_rows = int(max_task_rows)
    if task_cost is not None and not (np.isfinite(task_cost) and task_cost > 0):
        raise ValueError(f"task_cost must be finite and > 0, got {task_cost!r}")

    ball_offsets = np.ascontiguousarray(cover.ball_offsets, dtype=np.int64)
    # The centres' coordinates packed together (the same bits as their rows): the centre
    # test runs for every row against every neighbour ball, and scattered rows made it
    # miss the cache (measured 1.6x slower).
    centre_xyz = np.ascontiguousarray(x[cover.centres])
    nb_offsets = np.ascontiguousarray(cover.neighbour_offsets, dtype=np.int64)
    nb_balls = np.ascontiguousarray(cover.neighbour_balls, dtype=np.int64)
    # A ball can hold an eps-neighbour of row i only if its centre is within R + eps of
    # row i; widened, because skipping a ball that holds a neighbour would be a bug.
    reach = query_radius(float(cover.radius) + eps)

    tag = metric_tag(validate_metric(metric))
    deg, up = _degrees(x, ball_offsets, centre_xyz, nb_offsets, nb_balls, reach, eps, tag)
    row_cost = _row_cost(deg, max_dim)
    total = float(row_cost.sum())
    if task_cost is None:
        target = max(total / DEFAULT_MIN_TASKS, total * DEFAULT_TASK_ROWS / n)
    else:
        target = float(task_cost)

    starts = _cut_tasks(ball_offsets, row_cost, target, max_task_rows)
    stops = np.append(starts[1:], n)
    cost = np.add.reduceat(row_cost, starts)
    del row_cost

    def one(k: int) -> np.ndarray:
        rows = (int(starts[k]), int(stops[k]))
        return _task_halo(x, ball_offsets, centre_xyz, nb_offsets, nb_balls, *rows, reach, eps, tag)

    n_threads = max(1, min(nb.get_num_threads(), len(starts)))
    if n_threads == 1:
        results = [one(k) for k in range(len(starts))]
    else:
        # The halo kernel releases the GIL, so threads share the coordinates for free.
        with ThreadPoolExecutor(max_workers=n_threads) as pool:
            results = list(pool.map(one, range(len(starts))))

    halo_len = np.array([h.shape[0] for h in results], dtype=np.int64)
    owned_edges = np.add.reduceat(up, starts, dtype=np.int64)
    n_edges = int(up.sum())
    del up
    halo_edges = np.array([int(deg[h].sum()) for h in results], dtype=np.int64)
    max_deg = np.maximum.reduceat(deg, starts)
    memory = _task_memory(halo_len, dim, halo_edges, owned_edges, max_deg).astype(np.int64)

    # Heaviest first so the long tasks start early and the tail of the run is short.
    rank = np.lexsort((starts, -cost))
    halo_offsets = np.zeros(len(starts) + 1, dtype=np.int64)
    np.cumsum(halo_len[rank], out=halo_offsets[1:])
    halo_rows = (
        np.concatenate([results[k] for k in rank]) if len(rank) else np.zeros(0, np.int64)
    )
    return Plan(
        eps=eps,
        max_dim=None if max_dim is None else int(max_dim),
        cover_radius=float(cover.radius),
        n_points=int(n),
        dim=int(dim),
        row_start=starts[rank].astype(np.int64),
        row_stop=stops[rank].astype(np.int64),
        halo_offsets=halo_offsets,
        halo_rows=halo_rows.astype(np.int64, copy=False),
        cost=cost[rank].astype(np.float64),
        memory=memory[rank],
        n_edges=n_edges,
    )


def summarise_plan(plan: Plan, cover: Cover) -> dict:
    """The figures to check before a run, as plain JSON-able values.

    Parameters
    ----------
    plan : Plan
    cover : Cover
        The cover the plan was made from.

    Returns
    -------
    dict
        ``points``, ``dim``, ``eps``, ``max_dim``, ``radius``, ``balls``, ``tasks``,
        ``owned_rows`` and ``halo_rows`` (each ``{"min", "median", "max"}``),
        ``replication`` (rows read by all tasks over N), ``total_cost``,
        ``heaviest_task_cost``, ``heaviest_task_memory`` (the estimate for the costliest
        task) and ``max_task_memory`` (the largest estimate of any task; what a worker's
        memory limit must exceed). Memory figures are estimates in bytes.
    """

    def spread(a: np.ndarray) -> dict:
        if a.size == 0:
            return {"min": 0, "median": 0.0, "max": 0}
        return {"min": int(a.min()), "median": float(np.median(a)), "max": int(a.max())}

    owned = plan.row_stop - plan.row_start
    heaviest = int(np.argmax(plan.cost)) if plan.n_tasks else None
    return {
        "points": int(plan.n_points),
        "dim": int(plan.dim),
        "eps": float(plan.eps),
        "max_dim": None if plan.max_dim is None else int(plan.max_dim),
        "radius": float(cover.radius),
        "balls": int(cover.n_balls),
        "tasks": int(plan.n_tasks),
        "owned_rows": spread(owned),
        "halo_rows": spread(plan.halo_sizes()),
        "replication": float(plan.replication()),
        "total_cost": float(plan.cost.sum()),
        "heaviest_task_cost": float(plan.cost[heaviest]) if heaviest is not None else 0.0,
        "heaviest_task_memory": int(plan.memory[heaviest]) if heaviest is not None else 0,
        "max_task_memory": int(plan.memory.max()) if plan.n_tasks else 0,
        "edges": int(plan.n_edges),
    }
