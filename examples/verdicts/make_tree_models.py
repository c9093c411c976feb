#!/usr/bin/env python3
"""Tree-ensemble models of the verdict benchmark (examples/verdicts/).

For every data shape of shapes.json (beside this script) this trains, on 4,000 rows drawn
from the shape's own generating distribution:

  trees/<shape>-gb.onnx   GradientBoostingRegressor(40 trees, max_depth 3, learning rate 0.1)
                          of the shape's honest target function y(x);
  trees/<shape>-rf.onnx   RandomForestClassifier(30 trees, max_depth 3, every feature
                          considered at each split) of the label 1[y(x) + e > median y],
                          e ~ N(0, (0.25 sd y)^2); its output is [P(0), P(1)].

The honest target function uses only the shape's `used` features (its `tree_target`
weights are zero elsewhere):

  y(x) = sum_j w_j tanh(z_j) + c z_p z_q,    z_j = (x_j - m_j) / s_j,

with m_j, s_j the feature's analytic mean and standard deviation (moments() below, the
same formulas as examples/verdicts/bench.rs) and (p, q, c) the shape's `interaction`.

It also writes trees/check.json: eight further rows drawn from each shape and
scikit-learn's own answers for them (the regressor's prediction, the classifier's
P(class 1)), so the benchmark's test checks that kilter's ONNX adapter answers as
scikit-learn does; and trees/versions.txt with the library versions used.

The shapes' sampling definitions (the Rust side draws its own corpora from the same
definitions with its own random generator):

  gaussian            x = mean + sd * (l z0 + sqrt(1 - l^2) e), z0, e ~ N(0, 1)
                      (one common factor z0: correlation l_i l_j between i and j)
  mixture             component c with probability weights[c]; x = means[c] + sds[c] * e
  student-t           x = location + scale * g * sqrt(df / w), g the one-factor Gaussian
                      with loadings l (unit variances), w ~ chi-square(df)
  counts-categorical  Poisson(rates) counts, then a one-hot block of one categorical
                      draw with probabilities `levels`, then N(continuous_mean,
                      continuous_sd^2) columns

Run from the repository root (takes a few seconds):

    pip install numpy scikit-learn skl2onnx onnx
    python3 examples/verdicts/make_tree_models.py
"""

import json
import os
import platform

import numpy as np
import onnx
import sklearn
import skl2onnx
from onnx import helper
from skl2onnx import convert_sklearn
from skl2onnx.common.data_types import FloatTensorType
from sklearn.ensemble import GradientBoostingRegressor, RandomForestClassifier

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "trees")
TRAIN_ROWS = 4000
CHECK_ROWS = 8
INPUT_NAME = "input"


def moments(shape):
    """Analytic mean and standard deviation of every feature."""
    kind = shape["kind"]
    if kind == "gaussian":
        return np.array(shape["mean"], float), np.array(shape["sd"], float)
    if kind == "mixture":
        w = np.array(shape["weights"], float)
        mu = np.array(shape["means"], float)
        sd = np.array(shape["sds"], float)
        mean = w @ mu
        var = w @ (sd**2 + mu**2) - mean**2
        return mean, np.sqrt(var)
    if kind == "student-t":
        df = shape["df"]
        return (np.array(shape["location"], float),
                np.array(shape["scale"], float) * np.sqrt(df / (df - 2.0)))
    if kind == "counts-categorical":
        rates = np.array(shape["rates"], float)
        levels = np.array(shape["levels"], float)
        cm = np.array(shape["continuous_mean"], float)
        cs = np.array(shape["continuous_sd"], float)
        return (np.concatenate([rates, levels, cm]),
                np.concatenate([np.sqrt(rates), np.sqrt(levels * (1 - levels)), cs]))
    raise ValueError(kind)


def one_factor(rng, n, loadings):
    l = np.array(loadings, float)
    z0 = rng.standard_normal((n, 1))
    e = rng.standard_normal((n, len(l)))
    return l * z0 + np.sqrt(1.0 - l**2) * e


def sample(shape, rng, n):
    kind = shape["kind"]
    if kind == "gaussian":
        g = one_factor(rng, n, shape["loadings"])
        return np.array(shape["mean"]) + np.array(shape["sd"]) * g
    if kind == "mixture":
        w = np.array(shape["weights"], float)
        c = rng.choice(len(w), size=n, p=w)
        mu = np.array(shape["means"], float)[c]
        sd = np.array(shape["sds"], float)[c]
        return mu + sd * rng.standard_normal(mu.shape)
    if kind == "student-t":
        df = shape["df"]
        g = one_factor(rng, n, shape["loadings"])
        w = rng.chisquare(df, size=(n, 1))
        return np.array(shape["location"]) + np.array(shape["scale"]) * g * np.sqrt(df / w)
    if kind == "counts-categorical":
        counts = rng.poisson(shape["rates"], size=(n, len(shape["rates"]))).astype(float)
        levels = np.array(shape["levels"], float)
        onehot = np.eye(len(levels))[rng.choice(len(levels), size=n, p=levels)]
        cont = (np.array(shape["continuous_mean"])
                + np.array(shape["continuous_sd"]) * rng.standard_normal((n, 2)))
        return np.concatenate([counts, onehot, cont], axis=1)
    raise ValueError(kind)


def target(shape, x):
    mean, sd = moments(shape)
    z = (x - mean) / sd
    t = shape["tree_target"]
    w = np.array(t["weights"], float)
    unused = [j for j in range(len(w)) if j not in shape["used"]]
    assert all(w[j] == 0.0 for j in unused), shape["name"]
    p, q, c = t["interaction"]
    assert p in shape["used"] and q in shape["used"], shape["name"]
    return np.tanh(z) @ w + c * z[:, int(p)] * z[:, int(q)]


def write_onnx(onx, name):
    # skl2onnx names the graph with a random UUID and lists operator sets in hash order;
    # a fixed name and a sorted list keep the bytes reproducible.
    onx.graph.name = name
    versions_by_domain = {}
    for o in onx.opset_import:
        versions_by_domain[o.domain] = max(o.version, versions_by_domain.get(o.domain, 0))
    del onx.opset_import[:]
    for domain in sorted(versions_by_domain):
        onx.opset_import.append(helper.make_opsetid(domain, versions_by_domain[domain]))
    onnx.checker.check_model(onx)
    with open(os.path.join(OUT, name + ".onnx"), "wb") as f:
        f.write(onx.SerializeToString())


def main():
    with open(os.path.join(HERE, "shapes.json"), encoding="utf-8") as f:
        shapes = json.load(f)["shapes"]
    os.makedirs(OUT, exist_ok=True)
    check = {}
    for i, shape in enumerate(shapes):
        d = len(shape["features"])
        rng = np.random.default_rng(20240 + i)
        x = sample(shape, rng, TRAIN_ROWS)
        y = target(shape, x)
        label = (y + 0.25 * y.std() * rng.standard_normal(len(y)) > np.median(y)).astype(int)
        x_check = sample(shape, rng, CHECK_ROWS)
        types = [(INPUT_NAME, FloatTensorType([None, d]))]

        gb = GradientBoostingRegressor(n_estimators=40, max_depth=3, learning_rate=0.1,
                                       random_state=0).fit(x, y)
        write_onnx(convert_sklearn(gb, initial_types=types), shape["name"] + "-gb")
        rf = RandomForestClassifier(n_estimators=30, max_depth=3, max_features=None,
                                    random_state=0).fit(x, label)
        write_onnx(convert_sklearn(rf, initial_types=types,
                                   options={id(rf): {"zipmap": False}}),
                   shape["name"] + "-rf")
        # The ONNX graphs compute in single precision: check rows as float32 values.
        x32 = x_check.astype(np.float32).astype(np.float64)
        check[shape["name"] + "-gb"] = {
            "inputs": x32.tolist(),
            "outputs": gb.predict(x32).tolist(),
        }
        check[shape["name"] + "-rf"] = {
            "inputs": x32.tolist(),
            "outputs": rf.predict_proba(x32)[:, 1].tolist(),
        }
    with open(os.path.join(OUT, "check.json"), "w", encoding="utf-8", newline="\n") as f:
        json.dump(check, f, indent=1)
        f.write("\n")
    with open(os.path.join(OUT, "versions.txt"), "w", encoding="utf-8", newline="\n") as f:
        f.write("python %s\nnumpy %s\nscikit-learn %s\nskl2onnx %s\nonnx %s\n" % (
            platform.python_version(), np.__version__, sklearn.__version__,
            skl2onnx.__version__, onnx.__version__))


if __name__ == "__main__":
    main()
