# docs/examples/feature_matrix.py: thousands of small clouds -> one exact feature matrix
import numpy as np

import chitally

rng = np.random.default_rng(0)
clouds = [rng.random((int(n), 3)) for n in rng.integers(50, 150, 1000)]  # sizes may differ
fm = chitally.feature_matrix(clouds, eps=0.5, grid="0:0.5:32", normalise=False)
print(fm.values.shape, fm.names[:3], fm.columns[:2])    # (1000, 32) ('0', '1', '2') ...
fm.save("features.parquet")                              # or .csv, .npy, .npz
