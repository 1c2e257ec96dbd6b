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
        spec = getattr(item, "callspec", None)
        if (getattr(item, "originalname", None) != "test_the_result_is_exact" or spec is None
                or spec.params.get("executor") != "dask-bundled"):
            continue
        job, inp = spec.params["job"], spec.params["inp"]
        if [i is inp for i in job.inputs].index(True) >= 2:
            item.add_marker(pytest.mark.slow)
