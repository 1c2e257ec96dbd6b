# docs/examples/image_features.py: a folder of images, one subfolder per class -> a feature matrix
import os

import numpy as np
from PIL import Image
from scipy.ndimage import gaussian_filter
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

import chitally

rng = np.random.default_rng(0)
for label, width in (("fine", 1.5), ("coarse", 3.0)):     # textures of our own: smoothed noise
    os.makedirs(f"textures/{label}", exist_ok=True)
    for i in range(30):
        f = gaussian_filter(rng.standard_normal((64, 64)), width, mode="wrap")
        grey = np.clip(128 + 40 * (f - f.mean()) / f.std(), 0, 255).astype(np.uint8)
        Image.fromarray(grey).save(f"textures/{label}/{i:02d}.png")
fm = chitally.feature_matrix("textures", grid="0:255:32", construction="cells")  # labels: the subfolders
print(fm.values.shape, fm.names[0], fm.labels[0])        # (60, 32) coarse/00 coarse
fm.save("texture-features.csv")                          # name,label,chi(0.0),...
model = make_pipeline(StandardScaler(), SVC())
print(cross_val_score(model, fm.values, fm.labels, cv=5).mean())
