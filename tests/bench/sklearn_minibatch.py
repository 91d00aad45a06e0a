"""Time scikit-learn MiniBatchKMeans(batch_size=1024).partial_fit over the
vectors core_bench dumped, and print sklearn_minibatch_per_s=<n>."""
import sys
import time

import numpy as np
from sklearn.cluster import MiniBatchKMeans

path, d, k = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
X = np.fromfile(path, dtype="<f8").reshape(-1, d)
mb = MiniBatchKMeans(n_clusters=k, batch_size=1024, random_state=0, n_init=1)
t0 = time.perf_counter()
for i in range(0, len(X), 1024):
    mb.partial_fit(X[i:i + 1024])
el = time.perf_counter() - t0
print(f"sklearn_minibatch_per_s={len(X) / el:.0f}")
