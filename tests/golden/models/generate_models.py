#!/usr/bin/env python3
"""Reference models and their scikit-learn predictions for kilter's model adapters.

This script is the source of every data file in tests/golden/models/ (everything but
itself and the hand-written README.md). It trains scikit-learn models on the fit rows of
the open breast-cancer corpus, exports them to ONNX with skl2onnx and to kilter's own
JSON model file, and records scikit-learn's own answers for the query rows, so the Rust
tests compare kilter's in-process inference against an independent implementation.

Split (the same as tests/golden/generate.py): data row i (0-based, header excluded) of
reference-corpora/breast_cancer.csv is a query row when i % 5 == 0 and a fit row
otherwise; the 30 feature columns are the inputs, `diagnosis` (0/1) the label.

Models (all take the 30 raw features):
  lr.onnx, lr.json       Pipeline(StandardScaler, LogisticRegression)
  lr_batch16.onnx        the same pipeline exported with a fixed batch dimension of 16
  lr_double.onnx         the same pipeline exported with a double-precision input
  lr_zipmap.onnx         the same pipeline exported with its default ZipMap output
                         (kilter must refuse it with advice)
  lr_logit_rank1.onnx    hand-built graph X.w' + b' with a rank-1 output [N] (the LR's
                         decision function with the scaler folded in)
  mlp.onnx, mlp.json     Pipeline(StandardScaler, MLPClassifier(16, 8), relu)
  rf.onnx                RandomForestClassifier(20 trees, max_depth 6)
  gb.onnx                GradientBoostingClassifier(30 estimators)
  gb_regressor.onnx      GradientBoostingRegressor(30 estimators) of the 0/1 label
  rf_regressor.onnx      RandomForestRegressor(10 trees, max_depth 5) of the 0/1 label
  pca5_encoder.onnx      Pipeline(StandardScaler, PCA(5)), an encoder for embeddings
  wine_gb.onnx           GradientBoostingClassifier(10, max_depth 2) on the wine corpus
                         (three classes, 13 features, same split), softmax transform
  wine_rf.onnx           RandomForestClassifier(10 trees, max_depth 4) on the wine corpus

For the JSON copies the scaler is folded into the first layer exactly:
W' = W / scale, b' = b - W (mean / scale).

expected.json records, for the 115 query rows: predict_proba of every classifier,
predict of the regressors, decision_function of the LR, transform of the PCA pipeline,
the LR pipeline's standardized features for the first ten query rows,
the analytic gradient of P(class 1) of the LR on raw features,
p (1 - p) w' computed as expit(z) expit(-z) w' (both factors at full relative
precision), and the library versions.

Run from the repository root:

    pip install numpy scikit-learn skl2onnx onnx
    python3 tests/golden/models/generate_models.py
"""

import hashlib
import json
import os
import platform

import numpy as np
import onnx
import sklearn
import skl2onnx
from onnx import TensorProto, helper
from scipy.special import expit
from skl2onnx import convert_sklearn
from skl2onnx.common.data_types import DoubleTensorType, FloatTensorType
from sklearn.decomposition import PCA
from sklearn.ensemble import (
    GradientBoostingClassifier,
    GradientBoostingRegressor,
    RandomForestClassifier,
    RandomForestRegressor,
)
from sklearn.linear_model import LogisticRegression
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..", ".."))
GOLDEN = os.path.join(ROOT, "tests", "golden")
OUT_DIR = os.path.join(GOLDEN, "models")
N_FEATURES = 30
INPUT_NAME = "input"


def versions():
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "sklearn": sklearn.__version__,
        "skl2onnx": skl2onnx.__version__,
        "onnx": onnx.__version__,
        "onnx_opset": onnx.defs.onnx_opset_version(),
        "platform": platform.platform(),
    }


def read_split(corpus="breast_cancer", n_features=N_FEATURES, label="diagnosis"):
    with open(os.path.join(ROOT, "reference-corpora", corpus + ".csv"), "rb") as f:
        lines = f.read().decode("utf-8").splitlines()
    while lines and lines[-1] == "":
        lines.pop()
    header, data = lines[0], lines[1:]
    names = header.split(",")
    assert len(names) == n_features + 1 and names[-1] == label, names
    query = [line for i, line in enumerate(data) if i % 5 == 0]
    fit = [line for i, line in enumerate(data) if i % 5 != 0]
    # The split must be the one committed beside the other golden values.
    for part, lines_ in (("fit", fit), ("query", query)):
        with open(os.path.join(GOLDEN, "%s_%s.csv" % (corpus, part)), "rb") as f:
            committed = f.read().decode("utf-8").splitlines()
        assert committed == [header] + lines_, "tests/golden/%s_%s.csv differs" % (corpus, part)

    def parse(rows):
        x = np.array([[float(v) for v in r.split(",")[:-1]] for r in rows], dtype=np.float64)
        y = np.array([int(r.split(",")[-1]) for r in rows], dtype=np.int64)
        return x, y

    x_fit, y_fit = parse(fit)
    x_query, y_query = parse(query)
    return names[:-1], x_fit, y_fit, x_query, y_query


def export(model, path, final_step, batch=None, tensor_type=FloatTensorType, zipmap=False,
           n_features=N_FEATURES):
    options = None
    if final_step is not None and not zipmap:
        options = {id(final_step): {"zipmap": False}}
    onx = convert_sklearn(
        model,
        initial_types=[(INPUT_NAME, tensor_type([batch, n_features]))],
        options=options,
    )
    write_onnx(onx, path)
    return onx


def write_onnx(onx, path):
    # skl2onnx names the graph with a random UUID; a fixed name keeps the files reproducible.
    onx.graph.name = os.path.splitext(path)[0]
    # skl2onnx lists the operator sets in hash order (and some twice); one entry per domain,
    # sorted, keeps the bytes independent of PYTHONHASHSEED.
    versions_by_domain = {}
    for o in onx.opset_import:
        versions_by_domain[o.domain] = max(o.version, versions_by_domain.get(o.domain, 0))
    del onx.opset_import[:]
    for domain in sorted(versions_by_domain):
        onx.opset_import.append(helper.make_opsetid(domain, versions_by_domain[domain]))
    onnx.checker.check_model(onx)
    data = onx.SerializeToString()
    with open(os.path.join(OUT_DIR, path), "wb") as f:
        f.write(data)
    return data


def fold_scaler(scaler, weights, bias):
    """First layer over raw features: W' = W / scale, b' = b - W (mean / scale).

    `weights` is units x inputs (kilter's layout)."""
    w = np.asarray(weights, dtype=np.float64)
    folded_w = w / scaler.scale_[np.newaxis, :]
    folded_b = np.asarray(bias, dtype=np.float64) - w @ (scaler.mean_ / scaler.scale_)
    return folded_w, folded_b


def layer(weights, bias, activation):
    return {
        "weights": [[float(v) for v in row] for row in weights],
        "bias": [float(v) for v in bias],
        "activation": activation,
    }


def compact(value, indent=0):
    """JSON with one line per innermost list of numbers (small and diff-friendly)."""
    pad = " " * indent
    if isinstance(value, dict):
        items = ['%s "%s": %s' % (pad, k, compact(v, indent + 1).lstrip())
                 for k, v in value.items()]
        return "%s{\n%s\n%s}" % (pad, ",\n".join(items), pad)
    if isinstance(value, list) and value and isinstance(value[0], (list, dict)):
        items = [compact(v, indent + 1) for v in value]
        return "%s[\n%s\n%s]" % (pad, ",\n".join(items), pad)
    return pad + json.dumps(value, allow_nan=False)


def write_json(doc, path):
    text = compact(doc)
    assert json.loads(text) == doc
    with open(os.path.join(OUT_DIR, path), "w", encoding="utf-8", newline="\n") as f:
        f.write(text + "\n")


def kilter_model(kind, layers, description):
    return {
        "format": "kilter-model",
        "version": 1,
        "kind": kind,
        "inputs": N_FEATURES,
        "layers": layers,
        "description": description,
    }


def rank1_logit_graph(w, b):
    """X.w' + b' with output shape [N]: the LR's decision function on raw features."""
    weights = helper.make_tensor("w", TensorProto.FLOAT, [N_FEATURES, 1], w.astype(np.float32))
    bias = helper.make_tensor("b", TensorProto.FLOAT, [1], np.array([b], dtype=np.float32))
    axes = helper.make_tensor("axes", TensorProto.INT64, [1], np.array([1], dtype=np.int64))
    nodes = [
        helper.make_node("MatMul", [INPUT_NAME, "w"], ["xw"]),
        helper.make_node("Add", ["xw", "b"], ["z2"]),
        helper.make_node("Squeeze", ["z2", "axes"], ["logit"]),
    ]
    graph = helper.make_graph(
        nodes,
        "logit",
        [helper.make_tensor_value_info(INPUT_NAME, TensorProto.FLOAT, ["N", N_FEATURES])],
        [helper.make_tensor_value_info("logit", TensorProto.FLOAT, ["N"])],
        initializer=[weights, bias, axes],
    )
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)],
                             producer_name="generate_models.py")


def rows(a):
    return [[float(v) for v in r] for r in np.atleast_2d(a)]


def main():
    os.makedirs(OUT_DIR, exist_ok=True)
    names, x_fit, y_fit, x_query, y_query = read_split()
    expected = {"versions": versions(), "query_rows": len(x_query), "features": names,
                "models": {}}
    models = expected["models"]

    # Logistic regression on standardized features.
    lr = Pipeline([("scale", StandardScaler()),
                   ("clf", LogisticRegression(max_iter=10000))]).fit(x_fit, y_fit)
    scaler, clf = lr.named_steps["scale"], lr.named_steps["clf"]
    export(lr, "lr.onnx", clf)
    export(lr, "lr_batch16.onnx", clf, batch=16)
    export(lr, "lr_double.onnx", clf, tensor_type=DoubleTensorType)
    export(lr, "lr_zipmap.onnx", clf, zipmap=True)
    w, b = fold_scaler(scaler, clf.coef_, clf.intercept_)
    write_json(kilter_model("logistic", [layer(w, b, "sigmoid")],
                            "scikit-learn %s StandardScaler + LogisticRegression on the "
                            "breast-cancer fit rows, scaler folded into the weights "
                            "(tests/golden/models/generate_models.py)" % sklearn.__version__),
               "lr.json")
    z = lr.decision_function(x_query)
    proba = lr.predict_proba(x_query)
    # Same decision function through the folded weights (a check of the folding).
    z_folded = x_query @ w[0] + b[0]
    assert np.max(np.abs(z - z_folded)) < 1e-9 * max(1.0, np.max(np.abs(z))), "fold"
    gradient = (expit(z) * expit(-z))[:, np.newaxis] * w[0][np.newaxis, :]
    models["lr"] = {"predict_proba": rows(proba), "decision_function": [float(v) for v in z],
                    "gradient_p1": rows(gradient),
                    # The scaler's output (the ONNX value "variable") for the first rows.
                    "standardized_head": rows(scaler.transform(x_query[:10]))}
    write_onnx(rank1_logit_graph(w[0], b[0]), "lr_logit_rank1.onnx")

    # Multilayer perceptron on standardized features.
    mlp = Pipeline([("scale", StandardScaler()),
                    ("clf", MLPClassifier(hidden_layer_sizes=(16, 8), activation="relu",
                                          random_state=0, max_iter=3000, tol=1e-6))])
    mlp.fit(x_fit, y_fit)
    scaler, net = mlp.named_steps["scale"], mlp.named_steps["clf"]
    assert net.out_activation_ == "logistic" and net.coefs_[-1].shape[1] == 1
    export(mlp, "mlp.onnx", net)
    layers = []
    for i, (coef, intercept) in enumerate(zip(net.coefs_, net.intercepts_)):
        weights = coef.T  # sklearn stores inputs x units, kilter units x inputs
        if i == 0:
            weights, intercept = fold_scaler(scaler, weights, intercept)
        last = i == len(net.coefs_) - 1
        layers.append(layer(weights, intercept, "sigmoid" if last else "relu"))
    write_json(kilter_model("mlp", layers,
                            "scikit-learn %s StandardScaler + MLPClassifier(16, 8) on the "
                            "breast-cancer fit rows, scaler folded into the first layer "
                            "(tests/golden/models/generate_models.py)" % sklearn.__version__),
               "mlp.json")
    models["mlp"] = {"predict_proba": rows(mlp.predict_proba(x_query)),
                     "n_iter": int(net.n_iter_)}

    # Tree ensembles on raw features.
    rf = RandomForestClassifier(n_estimators=20, max_depth=6, random_state=0).fit(x_fit, y_fit)
    export(rf, "rf.onnx", rf)
    models["rf"] = {"predict_proba": rows(rf.predict_proba(x_query))}

    gb = GradientBoostingClassifier(n_estimators=30, random_state=0).fit(x_fit, y_fit)
    export(gb, "gb.onnx", gb)
    models["gb"] = {"predict_proba": rows(gb.predict_proba(x_query))}

    y_fit_f = y_fit.astype(np.float64)
    gbr = GradientBoostingRegressor(n_estimators=30, random_state=0).fit(x_fit, y_fit_f)
    export(gbr, "gb_regressor.onnx", None)
    models["gb_regressor"] = {"predict": [float(v) for v in gbr.predict(x_query)]}

    rfr = RandomForestRegressor(n_estimators=10, max_depth=5, random_state=0).fit(x_fit, y_fit_f)
    export(rfr, "rf_regressor.onnx", None)
    models["rf_regressor"] = {"predict": [float(v) for v in rfr.predict(x_query)]}

    # Encoder: standardize then project on the first five principal axes.
    pca = Pipeline([("scale", StandardScaler()), ("pca", PCA(n_components=5))]).fit(x_fit)
    export(pca, "pca5_encoder.onnx", None)
    models["pca5_encoder"] = {"transform": rows(pca.transform(x_query)),
                              "explained_variance_ratio": [
                                  float(v) for v in pca.named_steps["pca"].explained_variance_ratio_]}

    # Three-class tree ensembles on the wine corpus (13 features, label `cultivar`, the
    # same split): softmax-transformed boosting and a forest with three class scores.
    _, w_fit, wy_fit, w_query, _ = read_split("wine", 13, "cultivar")
    wine_gb = GradientBoostingClassifier(n_estimators=10, max_depth=2, random_state=0)
    wine_gb.fit(w_fit, wy_fit)
    export(wine_gb, "wine_gb.onnx", wine_gb, n_features=13)
    models["wine_gb"] = {"predict_proba": rows(wine_gb.predict_proba(w_query))}
    wine_rf = RandomForestClassifier(n_estimators=10, max_depth=4, random_state=0)
    wine_rf.fit(w_fit, wy_fit)
    export(wine_rf, "wine_rf.onnx", wine_rf, n_features=13)
    models["wine_rf"] = {"predict_proba": rows(wine_rf.predict_proba(w_query))}

    write_json(expected, "expected.json")

    print("versions:", json.dumps(expected["versions"]))
    for name in sorted(os.listdir(OUT_DIR)):
        if name.endswith((".onnx", ".json")):
            with open(os.path.join(OUT_DIR, name), "rb") as f:
                data = f.read()
            print("  %-22s %7d bytes  sha256 %s" % (name, len(data),
                                                    hashlib.sha256(data).hexdigest()[:16]))
    for key in ("lr", "mlp", "rf", "gb"):
        p = np.array(models[key]["predict_proba"])
        acc = np.mean(np.argmax(p, axis=1) == y_query)
        print("  %s query accuracy %.3f" % (key, acc))
    print("  mlp iterations", models["mlp"]["n_iter"])


if __name__ == "__main__":
    main()
