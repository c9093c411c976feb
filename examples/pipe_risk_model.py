#!/usr/bin/env python3
"""A model process for kilter's line protocol, in plain Python (standard library only).

It scores the invented pipe segments of `kilter demo` (twelve readings, in the order of
the demo's CSV columns) for inspection priority with a fixed logistic model, and answers
gradients when asked. Run it under kilter with

    kilter predict --model-cmd "python3 examples/pipe_risk_model.py" --input kilter-demo/segments.csv --id-column segment_id

The protocol: one JSON request per line on stdin, {"inputs": [[...], ...]} with an
optional "gradients_for": T; one JSON answer per line on stdout, {"outputs": [[...], ...]}
and, when asked, "gradients": [[...], ...] (d output[T] / d input). It exits when stdin
closes. Anything it prints to stderr shows up in kilter's error messages.
"""

import json
import math
import sys

# Invented weights on standardized readings: older, corroded pipes with large pressure
# drops and repairs rank higher.
MEANS = [480.0, 467.0, 454.0, 9.0, 1.2, 44.0, 200.0, 4.5, 13.0, 0.75, 0.45, 1.6]
SCALES = [45.0, 46.0, 48.0, 5.0, 0.5, 24.0, 71.0, 2.0, 5.0, 0.21, 0.12, 1.4]
WEIGHTS = [0.4, -0.2, -0.6, 0.3, 0.5, 0.9, -0.3, 0.6, 0.1, -0.4, 0.3, 0.7]
BIAS = -1.0


def probability(row):
    z = BIAS + sum(w * (x - m) / s for w, x, m, s in zip(WEIGHTS, row, MEANS, SCALES))
    return 1.0 / (1.0 + math.exp(-z)) if z >= 0 else math.exp(z) / (1.0 + math.exp(z))


def answer(request):
    rows = request["inputs"]
    if any(len(row) != len(WEIGHTS) for row in rows):
        return {"error": f"expected {len(WEIGHTS)} readings per segment"}
    probabilities = [probability(row) for row in rows]
    reply = {"outputs": [[1.0 - p, p] for p in probabilities]}
    target = request.get("gradients_for")
    if target is not None:
        sign = 1.0 if target == 1 else -1.0
        reply["gradients"] = [
            [sign * p * (1.0 - p) * w / s for w, s in zip(WEIGHTS, SCALES)]
            for p in probabilities
        ]
    return reply


def main():
    for line in sys.stdin:
        try:
            reply = answer(json.loads(line))
        except Exception as error:  # report, do not crash: kilter shows the message
            reply = {"error": f"{type(error).__name__}: {error}"}
        sys.stdout.write(json.dumps(reply) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
