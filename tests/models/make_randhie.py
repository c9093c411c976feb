"""Writes the RAND Health Insurance Experiment sample and a logistic model over it.

Data: the RAND HIE subset distributed with statsmodels (statsmodels.datasets.randhie,
public domain; RAND Corporation Health Insurance Experiment, as used in Cameron &
Trivedi 2005, "Microeconometrics: Methods and Applications"). A seeded sample of
3,000 of its 20,190 person-years becomes reference-corpora/randhie_sample.csv with
columns as distributed, except:
  - physlm (a physical limitation index) becomes the label `limited` (1 where physlm > 0),
  - every other column is a feature: mdvis (outpatient visits, a count), lncoins,
    idp (binary), lpi, fmde, disea, and hlthg, hlthf, hlthp (self-rated health good /
    fair / poor, one-hot with "excellent" left out).
The model, tests/models/randhie_logistic.json, is scikit-learn's
Pipeline(StandardScaler, LogisticRegression(C=1.0)) fitted on the sample, folded into
kilter's JSON network format (W' = W / scale, b' = b - W mean / scale).

Run: python3 tests/models/make_randhie.py   (versions printed and written beside.)
"""
import json
import os
import platform

import numpy as np
import sklearn
import statsmodels
import statsmodels.datasets.randhie as randhie
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
FEATURES = ["mdvis", "lncoins", "idp", "lpi", "fmde", "disea", "hlthg", "hlthf", "hlthp"]


def main():
    data = randhie.load_pandas().data
    rng = np.random.default_rng(20261205)
    picked = np.sort(rng.choice(len(data), size=3000, replace=False))
    sample = data.iloc[picked]
    x = sample[FEATURES].to_numpy(dtype=np.float64)
    y = (sample["physlm"].to_numpy() > 0).astype(int)
    with open(os.path.join(ROOT, "reference-corpora", "randhie_sample.csv"), "w",
              newline="\n") as f:
        f.write(",".join(FEATURES + ["limited"]) + "\n")
        for row, label in zip(x, y):
            f.write(",".join(repr(float(v)).removesuffix(".0") if float(v).is_integer()
                             else repr(float(v)) for v in row) + f",{label}\n")
    model = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=1000)).fit(x, y)
    scaler, lr = model.steps[0][1], model.steps[1][1]
    w = lr.coef_ / scaler.scale_[np.newaxis, :]
    b = lr.intercept_ - lr.coef_ @ (scaler.mean_ / scaler.scale_)
    # kilter's logistic kind: one sigmoid unit scoring class 1; outputs [1 - p, p].
    doc = {
        "format": "kilter-model",
        "version": 1,
        "kind": "logistic",
        "inputs": len(FEATURES),
        "layers": [{"weights": [[float(v) for v in w[0]]], "bias": [float(b[0])],
                    "activation": "sigmoid"}],
        "description": "RAND HIE sample: P(physical limitation) from visits, coinsurance, "
                       "deductible, income, disease count and self-rated health",
    }
    with open(os.path.join(HERE, "randhie_logistic.json"), "w", newline="\n") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    check = model.predict_proba(x[:5])[:, 1]
    versions = {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit-learn": sklearn.__version__,
        "statsmodels": statsmodels.__version__,
        "first five P(limited)": [round(float(v), 12) for v in check],
    }
    with open(os.path.join(HERE, "randhie_versions.json"), "w", newline="\n") as f:
        json.dump(versions, f, indent=1)
        f.write("\n")
    print(json.dumps(versions))


if __name__ == "__main__":
    main()
