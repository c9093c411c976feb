#!/usr/bin/env python3
"""Exact occlusion and Shapley values for the declared-method test (tests/cli/declared.rs).

Writes queries.csv, declared.json and versions.txt beside this script. Everything is computed
with numpy alone, by the definitions:

  model   tests/golden/models/mlp.json, evaluated layer by layer (a -> act(W a + b));
          its last layer is one sigmoid unit p, and the score explained is p
          (output 1 of [1 - p, p], audited with --target 1).
  data    the fit rows of the breast-cancer corpus, tests/golden/breast_cancer_fit.csv
          (455 rows, 30 features, label column `diagnosis`), and as the explained
          inputs the rows QUERY_ROWS (0-based) of tests/golden/breast_cancer_query.csv,
          copied verbatim into queries.csv: the five whose p lies between 0.02 and 0.98
          (the network saturates on most rows, where every attribution is near 0) and
          three saturated ones.
  groups  six groups of the 30 features by the quantity measured (size: radius,
          perimeter and area; texture; smoothness; shape: compactness, concavity and
          concave points; symmetry; fractal dimension), each with its mean, error and
          worst columns.
  fills   `mean`: the column means of all fit rows (the profile is fitted with
          --holdout 0, so every row is a fitting row); `zero`: 0 in every feature.

  x_S        the input with the groups outside S set to the fill
  v(S)       f(x_S)
  occlusion  phi_g = f(x) - f(x with group g alone set to the fill)
  Shapley    phi_g = sum over S in N minus {g} of |S|! (m - |S| - 1)! / m!
                     [v(S + {g}) - v(S)], every coalition enumerated (m = 6: 32 terms
                     per group)

The script asserts efficiency (sum of the Shapley values = v(N) - v(empty)).

Run from anywhere:  python3 tests/golden/declared/generate_declared.py
"""

import itertools
import json
import math
import platform
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
GOLDEN = HERE.parent
QUERY_ROWS = [0, 2, 4, 43, 51, 55, 100, 106]
TARGET = 1
QUANTITIES = [
    ("size", ["radius", "perimeter", "area"]),
    ("texture", ["texture"]),
    ("smoothness", ["smoothness"]),
    ("shape", ["compactness", "concavity", "concave_points"]),
    ("symmetry", ["symmetry"]),
    ("fractal", ["fractal_dimension"]),
]


def read_csv(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    names = lines[0].split(",")
    assert names[-1] == "diagnosis"
    rows = [[float(v) for v in line.split(",")[:-1]] for line in lines[1:] if line]
    return names[:-1], np.array(rows, dtype=np.float64)


def load_model(path):
    model = json.loads(path.read_text(encoding="utf-8"))
    layers = [
        (np.array(l["weights"], dtype=np.float64), np.array(l["bias"], dtype=np.float64),
         l["activation"])
        for l in model["layers"]
    ]
    assert layers[-1][0].shape[0] == 1 and layers[-1][2] == "sigmoid"
    return layers


def sigmoid(z):
    # The numerically stable form, as for any logistic unit.
    out = np.empty_like(z)
    pos = z >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-z[pos]))
    e = np.exp(z[~pos])
    out[~pos] = e / (1.0 + e)
    return out


def predict(layers, x):
    """P(class 1) of each row of x."""
    a = x
    for w, b, act in layers:
        z = a @ w.T + b
        if act == "relu":
            a = np.maximum(z, 0.0)
        elif act == "sigmoid":
            a = sigmoid(z)
        elif act == "identity":
            a = z
        else:
            raise ValueError(act)
    return a[:, 0]


def groups_of(names):
    groups = []
    for _, quantities in QUANTITIES:
        members = []
        for q in quantities:
            for kind in ("mean", "error", "worst"):
                name = f"{q}_error" if kind == "error" else f"{kind}_{q}"
                members.append(names.index(name))
        groups.append(sorted(members))
    covered = sorted(i for g in groups for i in g)
    assert covered == list(range(len(names))), "the groups partition the features"
    return groups


def filled(x, groups, kept, fill):
    """x with every group not in `kept` set to the fill."""
    out = x.copy()
    for g, members in enumerate(groups):
        if g not in kept:
            out[members] = fill[members]
    return out


def occlusion(layers, x, groups, fill):
    m = len(groups)
    inputs = [x] + [filled(x, groups, set(range(m)) - {g}, fill) for g in range(m)]
    f = predict(layers, np.array(inputs))
    return [float(f[0] - f[1 + g]) for g in range(m)]


def shapley(layers, x, groups, fill):
    m = len(groups)
    coalitions = [frozenset(c) for s in range(m + 1) for c in itertools.combinations(range(m), s)]
    values = predict(layers, np.array([filled(x, groups, c, fill) for c in coalitions]))
    v = dict(zip(coalitions, values))
    phi = []
    for g in range(m):
        others = [i for i in range(m) if i != g]
        total = 0.0
        for s in range(m):
            weight = math.factorial(s) * math.factorial(m - s - 1) / math.factorial(m)
            for c in itertools.combinations(others, s):
                c = frozenset(c)
                total += weight * (v[c | {g}] - v[c])
        phi.append(float(total))
    full, empty = v[frozenset(range(m))], v[frozenset()]
    assert abs(sum(phi) - (full - empty)) <= 1e-12, "efficiency"
    return phi, float(full), float(empty)


def main():
    names, fit = read_csv(GOLDEN / "breast_cancer_fit.csv")
    query_names, queries = read_csv(GOLDEN / "breast_cancer_query.csv")
    assert query_names == names
    queries = queries[QUERY_ROWS]
    lines = (GOLDEN / "breast_cancer_query.csv").read_text(encoding="utf-8").splitlines()
    with open(HERE / "queries.csv", "w", encoding="utf-8", newline="\n") as f:
        f.write(lines[0] + "\n")
        for r in QUERY_ROWS:
            f.write(lines[1 + r] + "\n")
    assert np.array_equal(read_csv(HERE / "queries.csv")[1], queries)
    layers = load_model(GOLDEN / "models" / "mlp.json")
    groups = groups_of(names)
    fills = {"mean": fit.mean(axis=0), "zero": np.zeros(len(names))}
    cases = []
    for method in ("occlusion:mean", "occlusion:zero", "shapley:mean", "shapley:zero"):
        kind, fill_name = method.split(":")
        fill = fills[fill_name]
        rows = []
        for r, x in enumerate(queries):
            if kind == "occlusion":
                rows.append({"row": r, "attribution": occlusion(layers, x, groups, fill)})
            else:
                phi, full, empty = shapley(layers, x, groups, fill)
                rows.append({"row": r, "attribution": phi, "prediction": full,
                             "expected_value": empty})
        cases.append({"method": method, "rows": rows})
    doc = {
        "model": "tests/golden/models/mlp.json",
        "reference": "tests/golden/breast_cancer_fit.csv",
        "input": "tests/golden/declared/queries.csv",
        "input_rows_of_breast_cancer_query_csv": QUERY_ROWS,
        "label_column": "diagnosis",
        "target": TARGET,
        "group_names": [name for name, _ in QUANTITIES],
        "groups": groups,
        "mean_fill": [float(v) for v in fills["mean"]],
        "predictions": [float(v) for v in predict(layers, queries)],
        "cases": cases,
        "generated_with": {"python": platform.python_version(), "numpy": np.__version__},
    }
    with open(HERE / "declared.json", "w", encoding="utf-8", newline="\n") as f:
        json.dump(doc, f, indent=1, allow_nan=False)
        f.write("\n")
    with open(HERE / "versions.txt", "w", encoding="utf-8", newline="\n") as f:
        f.write(f"python {platform.python_version()}\nnumpy {np.__version__}\n")
    for case in cases:
        largest = max(abs(v) for row in case["rows"] for v in row["attribution"])
        print(f"{case['method']}: largest |attribution| {largest:.3e}")


if __name__ == "__main__":
    main()
