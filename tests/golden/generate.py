#!/usr/bin/env python3
"""Golden reference values for the kilter test suite.

This script is the source of every data file in tests/golden/ (everything but
itself and the hand-written README.md). It computes, with numpy / scipy /
scikit-learn, the scores that kilter must reproduce, so the Rust tests can
compare against an independent implementation:

  * {corpus}_fit.csv, {corpus}_query.csv
        Deterministic split of reference-corpora/{corpus}.csv: data row i
        (0-based, header excluded) goes to the query file when i % 5 == 0 and
        to the fit file otherwise. Lines are copied verbatim from the source
        (header + selected data lines, label column kept), written with "\\n"
        line ends, so both sides parse exactly the same decimal strings.
  * {corpus}_{config}.json
        For each query row: squared Mahalanobis distance and its chi-square
        tail probability, k-NN k-th / mean distance, local outlier factor,
        conformal p-values (in-sample calibration on the fit rows) and the
        off-manifold flag; plus the fitted location, covariance, Ledoit-Wolf
        shrinkage and the sorted calibration scores.
  * versions.txt
        Library versions used for the run.

Corpora: wine, breast_cancer. Configurations: none_empirical_k10,
none_ledoit-wolf_k10, standardize_empirical_k10, standardize_ledoit-wolf_k10,
pca5_ledoit-wolf_k10, standardize_ledoit-wolf_k3.

The script also asserts some independent checks (explicit Mahalanobis formula,
hand-computed Ledoit-Wolf shrinkage) and records query/calibration near-ties
under "near_ties" so the Rust side can skip fragile p-value comparisons.

Re-run from the repository root (output is deterministic):

    pip install numpy scipy scikit-learn
    python3 tests/golden/generate.py
"""

import json
import os
import platform
import sys

import numpy as np
import scipy
import scipy.stats
import sklearn
from sklearn.covariance import EmpiricalCovariance, LedoitWolf
from sklearn.decomposition import PCA
from sklearn.neighbors import LocalOutlierFactor, NearestNeighbors
from sklearn.preprocessing import StandardScaler

REPO_ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
CORPUS_DIR = os.path.join(REPO_ROOT, "reference-corpora")
OUT_DIR = os.path.join(REPO_ROOT, "tests", "golden")

CORPORA = ["wine", "breast_cancer"]

# name -> (embed, covariance, k)
CONFIGS = [
    ("none_empirical_k10", "none", "empirical", 10),
    ("none_ledoit-wolf_k10", "none", "ledoit-wolf", 10),
    ("standardize_empirical_k10", "standardize", "empirical", 10),
    ("standardize_ledoit-wolf_k10", "standardize", "ledoit-wolf", 10),
    ("pca5_ledoit-wolf_k10", "pca:5", "ledoit-wolf", 10),
    ("standardize_ledoit-wolf_k3", "standardize", "ledoit-wolf", 3),
]

OFF_MANIFOLD_ALPHA = 0.01
TIE_RTOL = 1e-9


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "sklearn": sklearn.__version__,
        "platform": platform.platform(),
    }


def read_lines(path):
    with open(path, "rb") as f:
        text = f.read().decode("utf-8")
    lines = text.splitlines()
    while lines and lines[-1] == "":
        lines.pop()
    return lines[0], lines[1:]


def write_lines(path, header, lines):
    with open(path, "w", encoding="utf-8", newline="") as f:
        f.write(header + "\n")
        for line in lines:
            f.write(line + "\n")


def parse_features(lines, n_cols):
    rows = []
    for line in lines:
        fields = line.split(",")
        assert len(fields) == n_cols, line
        int(fields[-1])  # the label must be an integer
        rows.append([float(v) for v in fields[:-1]])
    return np.array(rows, dtype=np.float64)


def embed(kind, x_fit, x_query):
    if kind == "none":
        return x_fit.copy(), x_query.copy()
    scaler = StandardScaler().fit(x_fit)
    s_fit, s_query = scaler.transform(x_fit), scaler.transform(x_query)
    if kind == "standardize":
        return s_fit, s_query
    assert kind.startswith("pca:")
    rank = int(kind.split(":")[1])
    pca = PCA(n_components=rank, svd_solver="full").fit(s_fit)
    return pca.transform(s_fit), pca.transform(s_query)


def hand_ledoit_wolf_shrinkage(z):
    """Ledoit & Wolf (2004) shrinkage intensity towards mu*I, computed directly."""
    n, d = z.shape
    xc = z - z.mean(axis=0)
    s = xc.T @ xc / n
    mu = np.trace(s) / d
    delta = np.sum((s - mu * np.eye(d)) ** 2)
    beta = 0.0
    for k in range(n):
        xk = xc[k][:, None]
        beta += np.sum((xk @ xk.T - s) ** 2)
    beta /= n * n
    return min(beta, delta) / delta, s, mu


def conformal_p(cal, value):
    return (1.0 + float(np.sum(cal >= value))) / (1.0 + len(cal))


def is_near(a, b):
    return abs(a - b) <= TIE_RTOL * max(abs(a), abs(b))


def near_tie_list(query_scores, cal_scores, field):
    out = []
    for i, q in enumerate(query_scores):
        hits = [c for c in cal_scores if is_near(q, c)]
        if hits:
            out.append({"row": i, "field": field,
                        "query_value": float(q),
                        "calibration_values": [float(c) for c in hits]})
    return out


def compute(corpus, name, embed_kind, cov_kind, k, x_fit, x_query, checks):
    z_fit, z_query = embed(embed_kind, x_fit, x_query)
    n_fit, dim = z_fit.shape
    n_query = z_query.shape[0]

    if cov_kind == "empirical":
        est = EmpiricalCovariance(assume_centered=False).fit(z_fit)
        shrinkage = None
    else:
        est = LedoitWolf(assume_centered=False).fit(z_fit)
        shrinkage = float(est.shrinkage_)

    d2 = est.mahalanobis(z_query)
    cal_mahal = est.mahalanobis(z_fit)
    chi2_p = scipy.stats.chi2.sf(d2, df=dim)

    # Independent checks of the covariance model.
    diff = z_query - est.location_
    d2_explicit = np.einsum("ij,ij->i", diff, np.linalg.solve(est.covariance_, diff.T).T)
    rel = float(np.max(np.abs(d2 - d2_explicit) / np.maximum(np.abs(d2_explicit), 1e-300)))
    cond = float(np.linalg.cond(est.covariance_))
    checks.append((corpus, name, "mahalanobis vs explicit solve, max rel diff", rel))
    if name == "standardize_empirical_k10":
        s_mle = np.cov(z_fit, rowvar=False, bias=True)
        assert np.allclose(est.covariance_, s_mle, rtol=1e-12, atol=1e-14)
        diff = z_query - z_fit.mean(axis=0)
        d2_mle = np.einsum("ij,ij->i", diff, np.linalg.solve(s_mle, diff.T).T)
        assert np.allclose(d2, d2_mle, rtol=1e-10, atol=1e-10), (corpus, name)
        checks.append((corpus, name, "standardize_empirical explicit-formula assert", "passed"))
    if cov_kind == "ledoit-wolf":
        hand, s_hand, mu = hand_ledoit_wolf_shrinkage(z_fit)
        assert abs(hand - shrinkage) <= 1e-10 * max(1.0, abs(hand)), (corpus, name, hand, shrinkage)
        target = (1.0 - hand) * s_hand + hand * mu * np.eye(dim)
        assert np.allclose(est.covariance_, target, rtol=1e-9, atol=1e-12 * abs(mu)), (corpus, name)
        checks.append((corpus, name, "ledoit-wolf shrinkage |sklearn - hand|", abs(hand - shrinkage)))

    nn = NearestNeighbors(n_neighbors=k, algorithm="brute", metric="euclidean").fit(z_fit)
    q_dist, _ = nn.kneighbors(z_query)
    knn_kth = q_dist[:, k - 1]
    knn_mean = q_dist.mean(axis=1)
    cal_dist, _ = nn.kneighbors()
    cal_knn = cal_dist[:, k - 1]

    # Ties at the k-th / (k+1)-th neighbour boundary make the neighbour set
    # (and therefore LOF) implementation-dependent; report them if present.
    boundary = []
    nn1 = NearestNeighbors(n_neighbors=k + 1, algorithm="brute", metric="euclidean").fit(z_fit)
    qd1, _ = nn1.kneighbors(z_query)
    cd1, _ = nn1.kneighbors()
    for label, dd in (("query", qd1), ("fit", cd1)):
        for i in range(dd.shape[0]):
            if is_near(dd[i, k - 1], dd[i, k]):
                boundary.append({"set": label, "row": i})

    lof_model = LocalOutlierFactor(n_neighbors=k, novelty=True, algorithm="brute").fit(z_fit)
    lof = -lof_model.score_samples(z_query)

    rows = []
    for i in range(n_query):
        p_m = conformal_p(cal_mahal, d2[i])
        p_k = conformal_p(cal_knn, knn_kth[i])
        p_c = min(1.0, 2.0 * min(p_m, p_k))
        rows.append({
            "row": i,
            "mahalanobis_d2": float(d2[i]),
            "chi2_p": float(chi2_p[i]),
            "knn_kth": float(knn_kth[i]),
            "knn_mean": float(knn_mean[i]),
            "lof": float(lof[i]),
            "p_mahalanobis": p_m,
            "p_knn": p_k,
            "p_combined": p_c,
            "off_manifold": bool(p_c < OFF_MANIFOLD_ALPHA),
        })

    ties = near_tie_list(d2, cal_mahal, "mahalanobis_d2") + near_tie_list(knn_kth, cal_knn, "knn_kth")

    doc = {
        "corpus": corpus,
        "config": {"embed": embed_kind, "covariance": cov_kind, "k": k, "holdout": 0},
        "shrinkage": shrinkage,
        "embedded_dim": int(dim),
        "n_fit": int(n_fit),
        "n_query": int(n_query),
        "location": [float(v) for v in est.location_],
        "covariance": [[float(v) for v in r] for r in est.covariance_],
        "covariance_condition_number": cond,
        "cal_mahalanobis": sorted(float(v) for v in cal_mahal),
        "cal_knn": sorted(float(v) for v in cal_knn),
        "near_ties": ties,
        "knn_boundary_ties": boundary,
        "rows": rows,
        "generated_with": versions(),
    }
    return doc


def main():
    checks = []
    summary = []
    for corpus in CORPORA:
        header, data = read_lines(os.path.join(CORPUS_DIR, corpus + ".csv"))
        n_cols = len(header.split(","))
        query_lines = [line for i, line in enumerate(data) if i % 5 == 0]
        fit_lines = [line for i, line in enumerate(data) if i % 5 != 0]
        write_lines(os.path.join(OUT_DIR, corpus + "_fit.csv"), header, fit_lines)
        write_lines(os.path.join(OUT_DIR, corpus + "_query.csv"), header, query_lines)
        x_fit = parse_features(fit_lines, n_cols)
        x_query = parse_features(query_lines, n_cols)

        for name, embed_kind, cov_kind, k in CONFIGS:
            doc = compute(corpus, name, embed_kind, cov_kind, k, x_fit, x_query, checks)
            path = os.path.join(OUT_DIR, "%s_%s.json" % (corpus, name))
            with open(path, "w", encoding="utf-8", newline="\n") as f:
                json.dump(doc, f, indent=1, allow_nan=False)
                f.write("\n")
            n_off = sum(r["off_manifold"] for r in doc["rows"])
            summary.append((corpus, name, doc["shrinkage"], doc["covariance_condition_number"],
                            n_off, len(doc["near_ties"]), len(doc["knn_boundary_ties"])))
            for t in doc["near_ties"]:
                print("WARNING: near-tie %s %s row %d: query %r vs calibration %r"
                      % (corpus, name, t["row"], t["query_value"], t["calibration_values"]),
                      file=sys.stderr)
            for t in doc["knn_boundary_ties"]:
                print("WARNING: k-th/(k+1)-th neighbour tie %s %s %s row %d"
                      % (corpus, name, t["set"], t["row"]), file=sys.stderr)

    v = versions()
    with open(os.path.join(OUT_DIR, "versions.txt"), "w", encoding="utf-8", newline="\n") as f:
        for key in ("python", "numpy", "scipy", "sklearn", "platform"):
            f.write("%s %s\n" % (key, v[key]))

    print("checks:")
    for c in checks:
        print("  %s %s: %s = %s" % c)
    print("summary (corpus, config, shrinkage, cond(cov), n_off_manifold, n_near_ties, n_boundary_ties):")
    for s in summary:
        print("  %s %s shrinkage=%r cond=%.3e off=%d near_ties=%d boundary_ties=%d" % s)


if __name__ == "__main__":
    main()
