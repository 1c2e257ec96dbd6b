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

# a field whose curve may be larger than one part: as `cloud-parts`, the fold keeping
# only the values' range and the present entries (the curve's domain)
FIELD_PARTS = JobKind(
    name="field-parts",
    task="chitally.jobs.field:compute_task",
    fold="chitally.jobs.field:FieldExtent",
    outputs=(*FIELD.outputs, ("parts", "<i8")),
    read="chitally.jobs.parts:read_parted",
    unit="blocks",
    fold_reads=("range", "present", "parts"),
    then="chitally.jobs.parts:merge_store",
)

# planning a cloud on the cluster (`chitally.jobs.stages`): four stages, each a kind
_STAGES = "chitally.jobs.stages"
PLAN_COUNT = JobKind(
    name="plan-count", task=f"{_STAGES}:count_task", fold=f"{_STAGES}:CellCounts",
    outputs=(("codes", "<i8"), ("counts", "<i8")), read=f"{_STAGES}:read_arrays", unit="blocks",
)
PLAN_SCATTER = JobKind(
    name="plan-scatter", task=f"{_STAGES}:scatter_task", fold=f"{_STAGES}:Nothing",
    outputs=(("coords", "<f8"), ("ids", "<i8"), ("cells", "<i8"), ("bounds", "<i8")),
    read=f"{_STAGES}:read_arrays", unit="blocks", fold_reads=("bounds",),
)
PLAN_REGION = JobKind(
    name="plan-region", task=f"{_STAGES}:region_task", fold=f"{_STAGES}:RegionCosts",
    outputs=(("coords", "<f8"), ("gids", "<i8"), ("cells", "<i8"), ("degree", "<i8"),
             ("hist", "<i8"), ("summary", "<f8")),
    read=f"{_STAGES}:read_arrays", unit="regions", fold_reads=("summary", "hist"),
)
PLAN_HALO = JobKind(
    name="plan-halo", task=f"{_STAGES}:halo_task", fold=f"{_STAGES}:TaskTable",
    outputs=(("coords", "<f8"), ("offsets", "<i8"), ("owned", "<i8"), ("rows", "<i8"),
             ("cost", "<f8"), ("memory", "<i8")),
    read=f"{_STAGES}:read_arrays", unit="regions",
    fold_reads=("offsets", "owned", "rows", "cost", "memory"),
)

# a cloud whose curve is larger than one part: jump tables reduced in parts of the scale
CLOUD_PARTS = JobKind(
    name="cloud-parts", task="chitally.jobs.cloud:compute_task", fold=f"{_STAGES}:Nothing",
    outputs=(("values", "<f8"), ("jumps", "<i8"), ("parts", "<i8")),
    read="chitally.jobs.parts:read_parted", unit="points", fold_reads=("parts",),
    then="chitally.jobs.parts:merge_store",
)
CURVE_MERGE = JobKind(
    name="curve-merge", task="chitally.jobs.parts:merge_task", fold="chitally.jobs.parts:PartTotals",
    outputs=(("values", "<f8"), ("jumps", "<i8"), ("total", "<i8")),
    read="chitally.jobs.parts:read_totals", unit="parts", fold_reads=("total",),
)

KINDS: dict[str, JobKind] = {k.name: k for k in (CLOUD, BATCH, BANDS, GRAPH, FIELD, FIELD_PARTS, PLAN_COUNT,
                                                 PLAN_SCATTER, PLAN_REGION, PLAN_HALO, CLOUD_PARTS,
                                                 CURVE_MERGE)}


def kind_of(name: str) -> JobKind:
    """The job kind called `name`; a store naming another kind is refused."""
    try:
        return KINDS[name]
    except KeyError:
        raise ValueError(f"unknown job kind {name!r}; this chitally runs {sorted(KINDS)}") from None


__all__ = ["BANDS", "BATCH", "CLOUD", "CLOUD_PARTS", "CURVE_MERGE", "FIELD", "FIELD_PARTS", "GRAPH", "KINDS",
           "PLAN_COUNT", "PLAN_HALO", "PLAN_REGION", "PLAN_SCATTER", "Fold", "JobKind", "TaskOutput", "kind_of"]
