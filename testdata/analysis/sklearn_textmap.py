"""Reference TF-IDF, truncated SVD and nearest-centroid cross-validation for
Trialogue's arms map, from scikit-learn (Debian's python3-sklearn).

Reads JSON on stdin: {"texts": [...], "labels": [...], "folds": [...]}.
Writes JSON on stdout: the vocabulary, idf, the TF-IDF matrix (dense rows),
the two leading singular values and coordinates of TruncatedSVD, and the
cross-validated NearestCentroid predictions for the given folds.
"""
import json
import sys

from sklearn.feature_extraction.text import TfidfVectorizer
from sklearn.decomposition import TruncatedSVD
from sklearn.neighbors import NearestCentroid
from sklearn.model_selection import PredefinedSplit, cross_val_predict

req = json.load(sys.stdin)
vec = TfidfVectorizer()  # defaults: lowercase, (?u)\b\w\w+\b, smooth_idf, l2
X = vec.fit_transform(req["texts"])
svd = TruncatedSVD(n_components=2, algorithm="arpack")
coords = svd.fit_transform(X)
pred = cross_val_predict(NearestCentroid(), X, req["labels"], cv=PredefinedSplit(req["folds"]))
json.dump({
    "vocabulary": [str(t) for t in vec.get_feature_names_out()],
    "idf": [float(v) for v in vec.idf_],
    "tfidf": X.toarray().tolist(),
    "singular": [float(v) for v in svd.singular_values_],
    "coords": coords.tolist(),
    "pred": [int(p) for p in pred],
}, sys.stdout)
