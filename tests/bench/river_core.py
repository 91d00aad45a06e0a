"""Time River on the vectors core_bench dumped, one vector at a time as a
stream: HalfSpaceTrees.score_one + learn_one, then cluster.KMeans
learn_one, per vector (River 0.26.1 defaults except n_clusters = k and a
fixed seed).  River is pure Python, so only the first `n` vectors are used
(a subsample; the rate per second is what is compared).  The dicts River
takes are built before the clock starts, so only River's own work is timed.

    river_core.py VECTORS DIM K N
prints river_hst_kmeans_per_s=<rate> river_subsample=<n>
"""
import sys
import time

import numpy as np
from river import anomaly, cluster

path, d, k, n = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
X = np.fromfile(path, dtype="<f8", count=n * d).reshape(-1, d)
names = [f"f{j}" for j in range(d)]
rows = [dict(zip(names, map(float, r))) for r in X]
hst = anomaly.HalfSpaceTrees(seed=42)
km = cluster.KMeans(n_clusters=k, seed=42)
t0 = time.perf_counter()
s = 0.0
for x in rows:
    s += hst.score_one(x)
    hst.learn_one(x)
    km.learn_one(x)
el = time.perf_counter() - t0
print(f"river_hst_kmeans_per_s={len(rows) / el:.1f} river_subsample={len(rows)}")
