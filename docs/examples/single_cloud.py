# docs/examples/single_cloud.py: one cloud's exact curve, in process
import numpy as np

import chitally

points = np.random.default_rng(0).random((5000, 3))    # or chitally.read_points("cloud.npy")
curve = chitally.euler_curve(points, eps=0.1, max_dim=3)  # exact; threads chosen by size
print(curve.at(0.05))                                    # the value at one scale
print(curve.sample(np.linspace(0, 0.1, 11)))             # a feature vector on a grid
values, chi = curve.values, curve.chi                    # the exact steps
curve.save("curve.csv")                                  # .csv, .json or .npz, metadata included
assert chitally.Curve.load("curve.csv") == curve         # exact comparison
