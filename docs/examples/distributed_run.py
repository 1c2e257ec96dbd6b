# docs/examples/distributed_run.py: a resumable run on a LocalCluster (or any scheduler)
import numpy as np

from chitally.jobs.cloud import Params, create_or_open
from chitally.runs import Where, run

if __name__ == "__main__":  # LocalCluster workers re-import this file: keep the work here
    points = np.random.default_rng(0).random((20000, 3))
    store = create_or_open("run.zarr", points, Params.checked(eps=0.05, max_dim=3))
    report = run(store, Where(workers=2))                # or Where(scheduler="tcp://host:8786")
    print(report.done, "of", report.n_tasks, "tasks;", report.curve)  # None if a task failed
