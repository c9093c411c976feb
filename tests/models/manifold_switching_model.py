#!/usr/bin/env python3
"""A line-protocol model that behaves one way on data-like inputs and another off them.

It reproduces the construction of Slack, Hilgard, Jia, Singh & Lakkaraju (AIES 2020,
"Fooling LIME and SHAP"): a model that relies on one feature whenever its input looks like
data, and on a different, innocuous feature when its input lies off the data manifold, so
that explanations built from off-manifold perturbations point at the innocuous feature.

Inputs: the first six features of the breast-cancer corpus, standardized (mean 0, sd 1):
mean_radius, mean_texture, mean_perimeter, mean_area, mean_smoothness, mean_compactness.
Radius, perimeter and area are correlated above 0.98 in that corpus, so an input whose
standardized radius departs from its perimeter or area is unlike any real one. The model:

    off  = |z_radius - z_perimeter| > 0.5  or  |z_radius - z_area| > 0.8
    f(x) = sigmoid(2 z_texture)  if off  else  sigmoid(2 z_radius)

It answers [1 - f, f] and never offers gradients (kilter falls back to finite
differences). Standard library only; it exits when stdin closes.
"""

import json
import math
import sys


def score(row):
    radius, texture, perimeter, area = row[0], row[1], row[2], row[3]
    off = abs(radius - perimeter) > 0.5 or abs(radius - area) > 0.8
    z = 2.0 * (texture if off else radius)
    return 1.0 / (1.0 + math.exp(-z)) if z >= 0 else math.exp(z) / (1.0 + math.exp(z))


def main():
    for line in sys.stdin:
        request = json.loads(line)
        outputs = []
        for row in request["inputs"]:
            if len(row) != 6:
                print(json.dumps({"error": "expected 6 features"}), flush=True)
                return
            p = score(row)
            outputs.append([1.0 - p, p])
        print(json.dumps({"outputs": outputs}), flush=True)


if __name__ == "__main__":
    main()
