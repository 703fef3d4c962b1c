"""Scores clusterings against true classes with scikit-learn, as JSON.

Reads {"truth": [...], "labels": {"name": [...]}, "features": [[...]], "k": K}
on stdin. Prints the adjusted Rand index (sklearn.metrics.adjusted_rand_score)
of each labelling, and of scikit-learn's KMeans (k-means++, 10 starts) on the
given features as a baseline.
"""
import json
import sys

import numpy as np
import sklearn
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score


def main():
    p = json.load(sys.stdin)
    truth = p["truth"]
    out = {"sklearn": sklearn.__version__, "ari": {}}
    for name, labels in p["labels"].items():
        out["ari"][name] = adjusted_rand_score(truth, labels)
    if p.get("features") and len(p["features"][0]) > 0:
        x = np.asarray(p["features"], float)
        km = KMeans(n_clusters=p["k"], n_init=10, random_state=0).fit(x)
        out["ari"]["sklearn_kmeans"] = adjusted_rand_score(truth, km.labels_)
    if p.get("affinity"):
        from scipy.sparse import coo_matrix
        from sklearn.cluster import SpectralClustering

        e = np.asarray(p["affinity"], float)
        m = len(truth)
        a = coo_matrix((e[:, 2], (e[:, 0].astype(int), e[:, 1].astype(int))), shape=(m, m)).tocsr()
        sc = SpectralClustering(n_clusters=p["k"], affinity="precomputed", assign_labels="cluster_qr", random_state=0)
        out["ari"]["sklearn_spectral_qr"] = adjusted_rand_score(truth, sc.fit_predict(a))
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
