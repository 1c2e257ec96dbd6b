"""Shared test setup: make the reference helpers in tests/references.py importable
whatever pytest's import mode."""

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(config, items):
    """Bundles of two tasks run the whole conformance suite of results only with -m slow:
    the default suite keeps the first two inputs of each kind on that executor (and every
    fault and event test), which exercise the bundle path; the results themselves are the
    serial and plain Dask executors' to prove on every input."""
    for item in items:
        if item.nodeid.startswith(SLOW_CASES):
            item.add_marker(pytest.mark.slow)
        spec = getattr(item, "callspec", None)
        if (getattr(item, "originalname", None) != "test_the_result_is_exact" or spec is None
                or spec.params.get("executor") != "dask-bundled"):
            continue
        job, inp = spec.params["job"], spec.params["inp"]
        if [i is inp for i in job.inputs].index(True) >= 2:
            item.add_marker(pytest.mark.slow)


# Heavy reference comparisons whose paths lighter cases of the same tests cover in the
# default suite (other clouds, other caps, the same metric); they run with -m slow.
SLOW_CASES = (
    "tests/test_dense_kernel.py::test_other_metrics_match_networkx_and_gudhi",  # test_metric.py covers both metrics
    *(f"tests/test_dense_kernel.py::test_dense_small_clouds_match_networkx_brute_force[{route}-{cloud}"
      for route in ("default", "exact", "splits") for cloud in ("lattice 3^4", "S^4")),
    "tests/test_dense_kernel.py::test_every_number_of_coordinates[9]",  # 12 takes the same loops
    "tests/test_dense_kernel.py::test_other_metrics_every_edge_matches_the_frame_kernel",
    *(f"tests/test_dense_kernel.py::test_every_edge_matches_the_frame_kernel[{route}-ball in R^8"
      for route in ("default", "exact", "splits")),
    "tests/test_metric.py::test_the_curve_equals_gudhi_networkx_and_the_matrix_curve[manhattan-halves-R10-None]",
    "tests/test_metric.py::test_the_curve_equals_gudhi_networkx_and_the_matrix_curve[chebyshev-halves-R10-None]",
    "tests/test_metric.py::test_the_curve_equals_gudhi_networkx_and_the_matrix_curve[chebyshev-dyadic-R2-None]",
    "tests/test_metric.py::test_the_curve_equals_gudhi_networkx_and_the_matrix_curve[chebyshev-lattice-R3-None]",
    "tests/test_metric.py::test_the_curve_equals_gudhi_networkx_and_the_matrix_curve[manhattan-dyadic-R2-None]",
    "tests/test_bands.py::test_bands_cover_the_known_mean_curve_at_the_stated_rate",  # a statistical rate over many draws
    "tests/test_runs.py::test_the_curve_depends_on_no_radius_no_order_no_split",
)
