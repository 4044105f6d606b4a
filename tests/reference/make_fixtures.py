#!/usr/bin/env python3
"""Regenerate the reference fixtures that weir's tests compare against.

The oracles are general-purpose libraries the project did not write (scikit-learn, SciPy,
NumPy) run on data sets bundled inside scikit-learn (Fisher's iris; Wisconsin diagnostic
breast cancer), plus the 20-instance ROC example of Fawcett (2006).

    pip install -r tests/reference/requirements.txt
    python3 tests/reference/make_fixtures.py

Writes tests/reference/fixtures/*.json. Versions used are recorded in each file.
"""
import json
import pathlib

import networkx as nx
import numpy as np
import scipy
import scipy.stats
import sklearn
from sklearn.calibration import calibration_curve
from sklearn.cluster import KMeans
from sklearn.isotonic import IsotonicRegression
from sklearn.datasets import load_breast_cancer, load_iris
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import (
    accuracy_score,
    average_precision_score,
    confusion_matrix,
    f1_score,
    precision_score,
    recall_score,
    roc_auc_score,
    roc_curve,
)
from sklearn.preprocessing import StandardScaler

OUT = pathlib.Path(__file__).parent / "fixtures"
VERSIONS = {
    "networkx": nx.__version__,
    "numpy": np.__version__,
    "scipy": scipy.__version__,
    "scikit-learn": sklearn.__version__,
}


def dump(name, obj):
    obj["generated_by"] = "tests/reference/make_fixtures.py"
    obj["versions"] = VERSIONS
    (OUT / name).write_text(json.dumps(obj, indent=1) + "\n")


def listf(a):
    return [float(x) for x in np.asarray(a).ravel()]


def classification_metrics(scores, labels, threshold, k):
    scores = np.asarray(scores, dtype=float)
    labels = np.asarray(labels, dtype=int)
    pred = (scores >= threshold).astype(int)
    tn, fp, fn, tp = confusion_matrix(labels, pred, labels=[0, 1]).ravel()
    fpr, tpr, thr = roc_curve(labels, scores, drop_intermediate=False)
    # Precision at k: the k highest scores, ties broken by position (a stable sort of -score).
    top = np.argsort(-scores, kind="stable")[:k]
    return {
        "scores": listf(scores),
        "labels": [int(x) for x in labels],
        "threshold": threshold,
        "k": k,
        "auc": float(roc_auc_score(labels, scores)),
        "average_precision": float(average_precision_score(labels, scores)),
        "confusion": {"tp": int(tp), "fp": int(fp), "tn": int(tn), "fn": int(fn)},
        "accuracy": float(accuracy_score(labels, pred)),
        "precision": float(precision_score(labels, pred)),
        "recall": float(recall_score(labels, pred)),
        "specificity": float(tn / (tn + fp)),
        "f1": float(f1_score(labels, pred)),
        "precision_at_k": float(labels[top].mean()),
        "roc_fpr": listf(fpr),
        "roc_tpr": listf(tpr),
        "roc_thresholds": [float(x) if np.isfinite(x) else None for x in thr],
    }


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    cancer = load_breast_cancer()
    malignant = (cancer.target == 0).astype(int)  # positive class: malignant (the minority)
    iris = load_iris()

    # 1. Classification metrics: breast cancer, "mean radius" as the score (it has ties).
    radius = cancer.data[:, list(cancer.feature_names).index("mean radius")]
    m = classification_metrics(radius, malignant, threshold=15.0, k=50)
    probs = (radius - radius.min()) / (radius.max() - radius.min())
    frac_pos, mean_pred = calibration_curve(malignant, probs, n_bins=10, strategy="uniform")
    m["calibration_probs"] = listf(probs)
    m["calibration_observed"] = listf(frac_pos)
    m["calibration_mean_predicted"] = listf(mean_pred)
    m["source"] = "scikit-learn metrics on load_breast_cancer(), score = mean radius, positive = malignant"
    dump("metrics_breast_cancer.json", m)

    # 2. Fawcett (2006), Fig. 3: 20 scored instances (data from memory; AUC from scikit-learn).
    f_scores = [.9, .8, .7, .6, .55, .54, .53, .52, .51, .505,
                .4, .39, .38, .37, .36, .35, .34, .33, .30, .1]
    f_labels = [1, 1, 0, 1, 1, 1, 0, 0, 1, 0, 1, 0, 1, 0, 0, 0, 1, 0, 1, 0]
    f = classification_metrics(f_scores, f_labels, threshold=0.54, k=10)
    f["source"] = ("Fawcett, An introduction to ROC analysis, Pattern Recognition Letters 27 (2006), "
                   "Fig. 3 (instances from memory); metrics by scikit-learn")
    dump("fawcett_2006.json", f)

    # 3. k-means on iris from explicit starting centres (rows 0, 50, 100), Lloyd's algorithm.
    x = iris.data
    init = x[[0, 50, 100]]
    km = KMeans(n_clusters=3, init=init, n_init=1, max_iter=1000, tol=0.0, algorithm="lloyd").fit(x)
    dump("kmeans_iris.json", {
        "x": [listf(r) for r in x],
        "init": [listf(r) for r in init],
        "centres": [listf(r) for r in km.cluster_centers_],
        "labels": [int(v) for v in km.labels_],
        "inertia_sum": float(km.inertia_),
        "source": "sklearn.cluster.KMeans(init=rows 0,50,100, n_init=1, algorithm='lloyd') on load_iris()",
    })

    # 4. Logistic regression, L2, on standardised breast cancer; C = 1/alpha.
    z = StandardScaler().fit_transform(cancer.data)
    fits = []
    for alpha in [1.0, 10.0]:
        lr = LogisticRegression(C=1.0 / alpha, solver="lbfgs", tol=1e-12, max_iter=100000).fit(z, malignant)
        fits.append({
            "alpha": alpha,
            "coef": listf(lr.coef_),
            "intercept": float(lr.intercept_[0]),
            "proba": listf(lr.predict_proba(z)[:, 1]),
        })
    dump("logistic_breast_cancer.json", {
        "z": [listf(r) for r in z],
        "y": [int(v) for v in malignant],
        "fits": fits,
        "source": "sklearn LogisticRegression(C=1/alpha, lbfgs) on StandardScaler(load_breast_cancer())",
    })

    # 5. Platt-style 1-D logistic fit without penalty (C = infinity): margin = standardised mean radius.
    s = z[:, 0]
    platt = LogisticRegression(C=np.inf, solver="lbfgs", tol=1e-12, max_iter=100000).fit(s[:, None], malignant)
    dump("platt_breast_cancer.json", {
        "margins": listf(s),
        "y": [int(v) for v in malignant],
        "a": float(platt.coef_[0, 0]),
        "b": float(platt.intercept_[0]),
        "source": "sklearn LogisticRegression(C=inf) on one feature of load_breast_cancer()",
    })

    # 6. Drift: KS (SciPy) and PSI (NumPy, weir's documented binning rule) between the
    # benign and malignant "mean texture", and a categorical PSI on iris petal length.
    texture = cancer.data[:, list(cancer.feature_names).index("mean texture")]
    base, cur = texture[malignant == 0], texture[malignant == 1]
    edges = np.unique(np.quantile(base, np.arange(1, 10) / 10))  # numpy default: linear
    def shares(v):
        counts = np.bincount(np.searchsorted(edges, v, side="left"), minlength=len(edges) + 1)
        return counts, np.maximum(counts / len(v), 1e-4)
    bc, bs = shares(base)
    cc, cs = shares(cur)
    psi = float(np.sum((cs - bs) * np.log(cs / bs)))
    ks = scipy.stats.ks_2samp(base, cur)
    petal = np.round(iris.data[:, 2]).astype(int).astype(str)
    cb, cc2 = petal[iris.target == 1], petal[iris.target == 2]
    cats = sorted(set(cb) | set(cc2))
    pb = np.maximum(np.array([np.mean(cb == c) for c in cats]), 1e-4)
    pc = np.maximum(np.array([np.mean(cc2 == c) for c in cats]), 1e-4)
    dump("drift.json", {
        "baseline": listf(base),
        "current": listf(cur),
        "edges": listf(edges),
        "baseline_counts": [int(v) for v in bc],
        "current_counts": [int(v) for v in cc],
        "psi": psi,
        "ks": float(ks.statistic),
        "categorical_baseline": list(cb),
        "categorical_current": list(cc2),
        "categorical_psi": float(np.sum((pc - pb) * np.log(pc / pb))),
        "source": ("scipy.stats.ks_2samp and a NumPy PSI on load_breast_cancer() mean texture "
                   "(benign vs malignant) and load_iris() rounded petal length (versicolor vs virginica)"),
    })

    # 7. Wilson score intervals (SciPy binomtest(...).proportion_ci(method="wilson")).
    cases = []
    for k, n in [(0, 10), (1, 10), (5, 10), (10, 10), (3, 47), (81, 200), (1, 1000), (999, 1000)]:
        ci = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        cases.append({"k": k, "n": n, "low": float(ci.low), "high": float(ci.high)})
    dump("wilson.json", {
        "cases": cases,
        "source": "scipy.stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method='wilson')",
    })

    # 8. Isotonic calibration: IsotonicRegression(out_of_bounds="clip") on the standardised
    # mean radius (it has ties) of breast cancer; predictions at the training points and at
    # query points between, on and beyond the knots. Expected calibration error of the fitted
    # probabilities by a direct NumPy computation over ten equal-width bins (a probability on
    # an inner edge falls in the upper bin, as in calibration_curve).
    iso = IsotonicRegression(out_of_bounds="clip").fit(s, malignant)
    queries = np.concatenate([np.linspace(s.min() - 1.0, s.max() + 1.0, 97), s[:25]])
    fitted = iso.predict(s)
    edges10 = np.linspace(0.0, 1.0, 11)
    bin_of = np.searchsorted(edges10[1:-1], fitted, side="right")
    ece = 0.0
    for b in range(10):
        sel = bin_of == b
        if sel.any():
            ece += sel.mean() * abs(fitted[sel].mean() - malignant[sel].mean())
    dump("isotonic_breast_cancer.json", {
        "x": listf(s),
        "y": [int(v) for v in malignant],
        "queries": listf(queries),
        "predicted": listf(iso.predict(queries)),
        "fitted": listf(fitted),
        "ece_of_fitted": float(ece),
        "source": ("sklearn.isotonic.IsotonicRegression(out_of_bounds='clip') on standardised mean "
                   "radius of load_breast_cancer(), positive = malignant; ECE by direct NumPy "
                   "computation over 10 equal-width bins"),
    })

    # 9. Connected components (networkx.connected_components).
    # (a) Zachary's karate club (networkx.karate_club_graph()), read as weir reads parties:
    # each member is a party, each friendship a claim naming its two members. A member with
    # more friendships than the cap is a hub and links nothing; networkx's components of the
    # bipartite claim-party graph without the hubs give the expected groups of claims.
    karate = nx.karate_club_graph()
    cap = 10
    edges = sorted((min(u, v), max(u, v)) for u, v in karate.edges())
    hubs = sorted(n for n in karate.nodes() if karate.degree(n) > cap)
    b = nx.Graph()
    for i, (u, v) in enumerate(edges):
        b.add_node(("claim", i))
        for m in (u, v):
            if m not in hubs:
                b.add_edge(("claim", i), ("member", m))
    karate_groups = sorted(
        sorted(n[1] for n in comp if n[0] == "claim") for comp in nx.connected_components(b)
    )
    # (b) A random graph (networkx.gnm_random_graph(300, 240, seed=7)): each node a claim,
    # each edge a party named by its two claims; components of claims.
    g = nx.gnm_random_graph(300, 240, seed=7)
    random_edges = sorted((min(u, v), max(u, v)) for u, v in g.edges())
    random_groups = sorted(sorted(c) for c in nx.connected_components(g))
    dump("components.json", {
        "karate": {"edges": [list(e) for e in edges], "cap": cap, "hubs": hubs,
                   "claim_groups": karate_groups},
        "random": {"nodes": 300, "edges": [list(e) for e in random_edges],
                   "groups": random_groups},
        "source": ("networkx.connected_components on networkx.karate_club_graph() read as "
                   "claims (edges) and parties (members) without members of degree > cap, "
                   "and on networkx.gnm_random_graph(300, 240, seed=7)"),
    })


if __name__ == "__main__":
    main()
