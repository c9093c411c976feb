#!/usr/bin/env python3
"""Compare two kilter JSON Lines outputs field by field.

Usage: compare_backends.py A.jsonl B.jsonl [TOLERANCE [FLOOR]]

Every record of A is paired with the record on the same line of B. Floating-point numbers
must agree to TOLERANCE (default 1e-9) in relative difference |a - b| / max(|a|, |b|, FLOOR)
(FLOOR default 1e-300; audit records set it so that attributions that are zero up to
round-off compare by their absolute difference);
booleans, integers, strings and nulls must be equal, and both records must have the same
structure. Nested objects and arrays are compared element by element, each leaf named by
its path (e.g. `scores.knn_distance`, `p_values[2]`; array indices are folded into `[]` for
the per-field summary). Prints the largest relative difference per field and exits 1 on any
violation, 2 on a usage or input error.
"""

import json
import math
import sys


FLOOR = 1e-300


def relative_difference(a, b):
    if a == b:  # also equal infinities
        return 0.0
    if math.isnan(a) and math.isnan(b):
        return 0.0
    if math.isnan(a) or math.isnan(b) or math.isinf(a) or math.isinf(b):
        return math.inf
    return abs(a - b) / max(abs(a), abs(b), FLOOR)


def kind(value):
    if isinstance(value, bool):
        return "bool"
    if isinstance(value, int):
        return "int"
    if isinstance(value, float):
        return "float"
    if isinstance(value, str):
        return "string"
    if value is None:
        return "null"
    if isinstance(value, list):
        return "array"
    return "object"


class Comparison:
    def __init__(self, tolerance):
        self.tolerance = tolerance
        self.largest = {}  # field -> (relative difference, line, a, b)
        self.exact_fields = {}  # field -> number of exactly compared values
        self.violations = []

    def violation(self, line, path, message):
        where = f"line {line}" if line else "files"
        self.violations.append(f"{where}: {path or '(record)'}: {message}")

    def compare(self, line, path, a, b):
        ka, kb = kind(a), kind(b)
        # serde_json prints every f64 with a fraction or exponent, so an integer against a
        # float (or a null, which is how a NaN is written) is a change of type, not of value.
        if ka != kb:
            self.violation(line, path, f"{ka} {a!r} against {kb} {b!r}")
            return
        field = fold(path)
        if ka == "object":
            keys_a, keys_b = list(a), list(b)
            if set(keys_a) != set(keys_b):
                only_a = sorted(set(keys_a) - set(keys_b))
                only_b = sorted(set(keys_b) - set(keys_a))
                self.violation(line, path, f"keys only in A {only_a}, only in B {only_b}")
            for key in keys_a:
                if key in b:
                    self.compare(line, f"{path}.{key}" if path else key, a[key], b[key])
        elif ka == "array":
            if len(a) != len(b):
                self.violation(line, path, f"length {len(a)} against {len(b)}")
            for i, (x, y) in enumerate(zip(a, b)):
                self.compare(line, f"{path}[{i}]", x, y)
        elif ka == "float":
            diff = relative_difference(a, b)
            best = self.largest.get(field)
            if best is None or diff > best[0] or (math.isnan(diff) and not math.isnan(best[0])):
                self.largest[field] = (diff, line, a, b)
            if not diff <= self.tolerance:
                self.violation(
                    line, path, f"{a!r} against {b!r}: relative difference {diff:.3e}"
                )
        else:
            self.exact_fields[field] = self.exact_fields.get(field, 0) + 1
            if a != b:
                self.violation(line, path, f"{a!r} against {b!r} must be equal")


def fold(path):
    """`scores.p[3].x` -> `scores.p[].x`: one summary line per field, not per element."""
    out, i = [], 0
    while i < len(path):
        if path[i] == "[":
            j = path.index("]", i)
            out.append("[]")
            i = j + 1
        else:
            out.append(path[i])
            i += 1
    return "".join(out)


def read_jsonl(name):
    records = []
    with open(name, encoding="utf-8") as handle:
        for number, text in enumerate(handle, start=1):
            if not text.strip():
                continue
            try:
                records.append((number, json.loads(text)))
            except json.JSONDecodeError as error:
                raise SystemExit(f"{name}:{number}: not JSON: {error}") from None
    return records


def main(argv):
    global FLOOR
    if len(argv) not in (3, 4, 5):
        print(__doc__.strip().splitlines()[2], file=sys.stderr)
        return 2
    try:
        tolerance = float(argv[3]) if len(argv) >= 4 else 1e-9
        FLOOR = float(argv[4]) if len(argv) == 5 else FLOOR
    except ValueError:
        print(f"tolerance and floor must be numbers, not {argv[3:]!r}", file=sys.stderr)
        return 2
    try:
        first, second = read_jsonl(argv[1]), read_jsonl(argv[2])
    except (OSError, SystemExit) as error:
        print(error, file=sys.stderr)
        return 2
    comparison = Comparison(tolerance)
    if len(first) != len(second):
        comparison.violation(0, "", f"{len(first)} records against {len(second)}")
    if not first and not second:
        comparison.violation(0, "", "both files hold no records")
    for (line, a), (_, b) in zip(first, second):
        comparison.compare(line, "", a, b)

    print(f"{argv[1]} against {argv[2]}: {min(len(first), len(second))} records, "
          f"tolerance {tolerance:g} relative")
    width = max([len(f) for f in comparison.largest] + [5])
    for field in sorted(comparison.largest):
        diff, line, a, b = comparison.largest[field]
        print(f"  {field:<{width}}  max rel diff {diff:.3e}  (line {line}: {a!r} vs {b!r})")
    for field in sorted(comparison.exact_fields):
        if field not in comparison.largest:
            print(f"  {field:<{width}}  exact ({comparison.exact_fields[field]} values)")
    if comparison.violations:
        shown = comparison.violations[:20]
        print(f"FAILED: {len(comparison.violations)} violations", file=sys.stderr)
        for text in shown:
            print(f"  {text}", file=sys.stderr)
        if len(comparison.violations) > len(shown):
            print(f"  ... and {len(comparison.violations) - len(shown)} more", file=sys.stderr)
        return 1
    print("OK")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
