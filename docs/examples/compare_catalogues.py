# docs/examples/compare_catalogues.py: bands, exact distances, a two-sample test, a figure
import numpy as np

from chitally import euler_curve
from chitally.bands import bands
from chitally.distances import distance
from chitally.plot import figure, plot_bands, save
from chitally.twosample import two_sample_test

rng = np.random.default_rng(0)
spread = rng.random((20000, 2))                          # sources scattered uniformly
strung = np.concatenate([np.c_[t, 0.5 + 0.1 * np.sin(6 * t)] + rng.normal(0, 0.01, (t.size, 2))
                         for t in [rng.random(10000), rng.random(10000)]])  # along filaments
b = bands(spread, eps=0.05, replicates=50, sample_size=2000, grid="0:0.05:51", seed=1)
lower, upper = b.band("simultaneous")                    # covers the mean curve at m = 2000
a_curves = [euler_curve(spread[rng.choice(20000, 500, replace=False)], 0.05) for _ in range(8)]
b_curves = [euler_curve(strung[rng.choice(20000, 500, replace=False)], 0.05) for _ in range(8)]
print(distance(a_curves[0], b_curves[0], p=1))           # exact L1: no sampling
print(two_sample_test(a_curves, b_curves, permutations=999, seed=0).p_value)
fig, ax = figure()
plot_bands(b, ax, label="uniform sources")
save(fig, "bands.png")                                   # png, svg or pdf
