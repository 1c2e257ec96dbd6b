# docs/examples/classifier.py: curves as features in a scikit-learn pipeline
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from chitally import CurveFeatures
from chitally.flocks import flocks

clouds, labels = flocks(per_kind=40, seed=0)            # three drone formations of our own
model = make_pipeline(CurveFeatures(eps=1.0, grid="0:1:41"), StandardScaler(), SVC())
print(cross_val_score(model, clouds, labels, cv=5).mean())
