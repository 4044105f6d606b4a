"""scikit-learn's fit time on exactly the matrix weir fitted, for the README's ratio.

    cargo run --release --example train_scale -- 1000000 --matrix /tmp/weir-matrix
    python3 benches/reference/sklearn_fit.py /tmp/weir-matrix

Settings matched to weir's: logistic regression with C = 1/alpha = 0.1 (weir: alpha 10,
intercept unpenalised), solver lbfgs with scikit-learn's default tol 1e-4 (weir's Newton stops
at a gradient of 1e-10 per row: tighter); k-means with k = 8, one k-means++ start, at most 300
iterations (weir: the same through linfa).
"""

import sys
import time

import numpy as np
import sklearn
from sklearn.cluster import KMeans
from sklearn.linear_model import LogisticRegression

d = sys.argv[1]
n, m = (int(v) for v in open(f"{d}/shape.txt").read().split())
x = np.fromfile(f"{d}/x.f64", dtype="<f8").reshape(n, m)
y = np.fromfile(f"{d}/y.u8", dtype=np.uint8)
print(f"scikit-learn {sklearn.__version__}, numpy {np.__version__}: {n} x {m} matrix, {y.mean():.3%} positive")

t = time.perf_counter()
lr = LogisticRegression(C=0.1, solver="lbfgs", max_iter=1000).fit(x, y)
print(f"logistic regression (C 0.1, lbfgs): {time.perf_counter() - t:.1f} s ({lr.n_iter_[0]} iterations)")

t = time.perf_counter()
km = KMeans(n_clusters=8, n_init=1, init="k-means++", max_iter=300, random_state=1).fit(x)
print(f"k-means (k 8, 1 run, k-means++): {time.perf_counter() - t:.1f} s ({km.n_iter_} iterations)")
