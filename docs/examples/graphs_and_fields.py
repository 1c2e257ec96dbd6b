# docs/examples/graphs_and_fields.py: graph filtrations and cubical complexes of arrays
import networkx as nx
import numpy as np

import chitally
from chitally.graphs import matrix_curve

g = nx.karate_club_graph()
by_degree = chitally.graph_curve(g, values="degree")     # lower-star: a simplex at its largest degree
print(by_degree.domain, by_degree.final)                 # the curve lives on [min degree, max degree]
rng = np.random.default_rng(0)
for u, v in g.edges:
    g.edges[u, v]["weight"] = rng.random()
by_weight = chitally.graph_curve(g, weights="weight", max_dim=3)  # flag filtration by edge weight
points = rng.random((200, 2))
d = np.sqrt(((points[:, None, :] - points[None, :, :]) ** 2).sum(-1))
print(matrix_curve(d, threshold=0.1).final)              # a distance matrix, thresholded
field = rng.normal(size=(128, 128))                      # an image, a volume, any n-D array
curve = chitally.field_curve(field, construction="cells")  # top cells; faces take the min around them
print(curve.at(0.0))                                     # Euler characteristic of {f <= 0}
