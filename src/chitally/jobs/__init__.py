"""The job kinds the engine runs, by name. A store names its kind; only kinds listed
here can run, so a store can never make a worker import code of its choosing."""

from __future__ import annotations

from .kind import Fold, JobKind, TaskOutput

CLOUD = JobKind(
    name="cloud",
    task="chitally.jobs.cloud:compute_task",
    fold="chitally.jobs.cloud:JumpSum",
    outputs=(("values", "<f8"), ("jumps", "<i8")),
    read="chitally.jobs.cloud:read_curve",
    unit="points",
    defaults=(("metric", "euclidean"),),
)

BATCH = JobKind(
    name="batch",
    task="chitally.jobs.batch:compute_task",
    fold="chitally.jobs.batch:PlaceRows",
    outputs=(("rows", "<i8"),),
    read="chitally.jobs.batch:read_matrix",
    unit="clouds",
    defaults=(("metric", "euclidean"),),
)

BANDS = JobKind(
    name="bands",
    task="chitally.jobs.bands:compute_task",
    fold="chitally.jobs.bands:KeepRows",
    outputs=(("rows", "<i8"),),
    read="chitally.jobs.bands:read_bands",
    unit="replicates",
)

# one large graph: vertex ranges with their halos, jump tables summed as for a cloud
GRAPH = JobKind(
    name="graph",
    task="chitally.jobs.graph:compute_task",
    fold="chitally.jobs.cloud:JumpSum",
    outputs=(("values", "<f8"), ("jumps", "<i8")),
    read="chitally.jobs.cloud:read_curve",
    unit="vertices",
)

FIELD = JobKind(
    name="field",
    task="chitally.jobs.field:compute_task",
    fold="chitally.jobs.field:FieldSum",
    outputs=(("values", "<f8"), ("jumps", "<i8"), ("range", "<f8"), ("present", "<i8")),
    read="chitally.jobs.field:read_curve",
    unit="blocks",
)

KINDS: dict[str, JobKind] = {k.name: k for k in (CLOUD, BATCH, BANDS, GRAPH, FIELD)}


def kind_of(name: str) -> JobKind:
    """The job kind called `name`; a store naming another kind is refused."""
    try:
        return KINDS[name]
    except KeyError:
        raise ValueError(f"unknown job kind {name!r}; this chitally runs {sorted(KINDS)}") from None


__all__ = ["BANDS", "BATCH", "CLOUD", "FIELD", "GRAPH", "KINDS", "Fold", "JobKind", "TaskOutput", "kind_of"]
