#!/usr/bin/env python3
"""Golden values for kilter's agreement statistics (src/audit/agreement.rs).

Writes agreement.json: pairs of attribution vectors and scipy.stats' Spearman
correlation (spearmanr: Pearson correlation of average ranks) and Kendall's
tau-b (kendalltau, variant 'b', the default), plus versions.txt. Cases: plain
random vectors, vectors with many ties (small integers), a reversed vector,
and attribution-like vectors of 30 and 64 groups. The vectors are drawn from
numpy's PCG64 with fixed seeds, so the file is reproducible.

Run from anywhere:  python3 tests/golden/agreement/generate_agreement.py
"""

import json
import platform
from pathlib import Path

import numpy as np
import scipy
from scipy import stats

HERE = Path(__file__).resolve().parent


def case(name, a, b):
    rho = stats.spearmanr(a, b).statistic
    tau = stats.kendalltau(a, b).statistic
    return {
        "name": name,
        "a": [float(v) for v in a],
        "b": [float(v) for v in b],
        "spearman": float(rho),
        "kendall_tau": float(tau),
    }


def main():
    rng = np.random.Generator(np.random.PCG64(20261202))
    cases = []
    for n in (5, 12, 30):
        a = rng.normal(size=n)
        b = a + rng.normal(scale=0.8, size=n)
        cases.append(case(f"normal_{n}", a, b))
    for n in (8, 20, 40):
        a = rng.integers(0, 4, size=n).astype(float)
        b = rng.integers(0, 3, size=n).astype(float)
        cases.append(case(f"ties_{n}", a, b))
    a = rng.normal(size=10)
    cases.append(case("reversed_10", a, -a))
    for n in (30, 64):
        a = rng.laplace(scale=0.1, size=n)
        b = np.where(rng.random(n) < 0.3, 0.0, a * rng.uniform(0.2, 2.0, size=n))
        cases.append(case(f"attribution_{n}", a, b))
    (HERE / "agreement.json").write_text(json.dumps({"cases": cases}, indent=1) + "\n")
    (HERE / "versions.txt").write_text(
        f"python {platform.python_version()}\nnumpy {np.__version__}\nscipy {scipy.__version__}\n"
    )


if __name__ == "__main__":
    main()
