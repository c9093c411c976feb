#!/usr/bin/env python3
"""Local outlier factor on a reference corpus of duplicated rows (tests/cli/duplicates.rs).

Writes duplicates.json and versions.txt beside this script.

Data: the wine split of tests/golden/ (wine_fit.csv: 142 distinct rows, 13 features,
label `cultivar`; wine_query.csv: 36 rows). The duplicated corpus repeats fit row i
(0-based) 1 + (7 i mod 20) times, its copies one after another (1,479 rows, 142
distinct; 70 of the distinct rows have 11 copies or more, 1,085 rows in all, so with
k = 10 their k nearest other rows are all copies). Every corpus is standardized with scikit-learn's
StandardScaler fitted on the rows of that corpus, as `kilter fit --embed standardize`
does; k = 10; every row is a fitting row (`--holdout 0`).

Recorded for each query row:
  sklearn_duplicated   LocalOutlierFactor(n_neighbors=10, novelty=True,
                       algorithm="brute") fitted on the duplicated corpus: the k-distance
                       of a row with 10 or more copies is 0, its density the 1e-10 floor
                       inverted, and the LOF of its neighbours explodes.
  sklearn_distinct     the same fitted on the distinct rows (wine_fit.csv itself), where
                       kilter's definition and scikit-learn's coincide.
  distinct_k_distance  kilter's documented definition (src/neighbours/lof.rs) on the
                       duplicated corpus, written out here in numpy over scikit-learn's
                       NearestNeighbors searches: the k-distance of a row is the distance
                       from its location to the k-th nearest other distinct location;
                       neighbourhoods are the k nearest rows, copies counted. This is the
                       project's own definition, not a scikit-learn method; the script
                       checks that the same code gives scikit-learn's LOF to 1e-12 on the
                       distinct rows.

Run from anywhere:  python3 tests/golden/duplicates/generate_duplicates.py
"""

import json
import platform
from pathlib import Path

import numpy as np
import sklearn
from sklearn.neighbors import LocalOutlierFactor, NearestNeighbors
from sklearn.preprocessing import StandardScaler

HERE = Path(__file__).resolve().parent
GOLDEN = HERE.parent
K = 10
FLOOR = 1e-10  # scikit-learn adds 1e-10 to the mean reachability distance


def read_csv(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    assert lines[0].split(",")[-1] == "cultivar"
    return np.array([[float(v) for v in line.split(",")[:-1]] for line in lines[1:] if line])


def sklearn_lof(fit, queries):
    model = LocalOutlierFactor(n_neighbors=K, novelty=True, algorithm="brute").fit(fit)
    return -model.score_samples(queries)


def distinct_k_distance_lof(fit, queries):
    """LOF with the k-distance taken over distinct locations (see the module docstring)."""
    locations, location_of = np.unique(fit, axis=0, return_inverse=True)
    location_of = location_of.ravel()
    k_loc = min(K, len(locations) - 1)
    # kneighbors() without arguments leaves each row out of its own neighbours.
    loc_dist, _ = NearestNeighbors(n_neighbors=k_loc, algorithm="brute").fit(
        locations).kneighbors()
    k_distance = loc_dist[:, k_loc - 1][location_of]
    rows = NearestNeighbors(n_neighbors=K, algorithm="brute").fit(fit)
    own_dist, own_idx = rows.kneighbors()
    reach = np.maximum(k_distance[own_idx], own_dist)
    density = 1.0 / (reach.mean(axis=1) + FLOOR)
    q_dist, q_idx = rows.kneighbors(queries)
    q_density = 1.0 / (np.maximum(k_distance[q_idx], q_dist).mean(axis=1) + FLOOR)
    return density[q_idx].mean(axis=1) / q_density


def main():
    fit = read_csv(GOLDEN / "wine_fit.csv")
    queries = read_csv(GOLDEN / "wine_query.csv")
    assert len(np.unique(fit, axis=0)) == len(fit), "the wine fit rows are distinct"
    copies = [1 + (7 * i) % 20 for i in range(len(fit))]
    duplicated = np.repeat(fit, copies, axis=0)

    scaler = StandardScaler().fit(duplicated)
    z_dup, q_dup = scaler.transform(duplicated), scaler.transform(queries)
    scaler = StandardScaler().fit(fit)
    z_fit, q_fit = scaler.transform(fit), scaler.transform(queries)

    sklearn_duplicated = sklearn_lof(z_dup, q_dup)
    sklearn_distinct = sklearn_lof(z_fit, q_fit)
    definition = distinct_k_distance_lof(z_dup, q_dup)
    # The numpy writing of the definition is scikit-learn's LOF when no row repeats.
    same = distinct_k_distance_lof(z_fit, q_fit)
    assert np.allclose(same, sklearn_distinct, rtol=1e-12, atol=0), "definition check"

    doc = {
        "reference": "tests/golden/wine_fit.csv",
        "input": "tests/golden/wine_query.csv",
        "label_column": "cultivar",
        "k": K,
        "copies": copies,
        "duplicated_rows": int(len(duplicated)),
        "distinct_rows": int(len(fit)),
        "locations_with_more_than_k_copies": int(sum(c > K for c in copies)),
        "sklearn_duplicated": [float(v) for v in sklearn_duplicated],
        "sklearn_distinct": [float(v) for v in sklearn_distinct],
        "distinct_k_distance": [float(v) for v in definition],
        "generated_with": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "sklearn": sklearn.__version__,
        },
    }
    with open(HERE / "duplicates.json", "w", encoding="utf-8", newline="\n") as f:
        json.dump(doc, f, indent=1, allow_nan=False)
        f.write("\n")
    with open(HERE / "versions.txt", "w", encoding="utf-8", newline="\n") as f:
        f.write(f"python {platform.python_version()}\nnumpy {np.__version__}\n"
                f"sklearn {sklearn.__version__}\n")
    print("rows", len(duplicated), "distinct", len(fit))
    for name in ("sklearn_duplicated", "sklearn_distinct", "distinct_k_distance"):
        v = np.array(doc[name])
        print(f"{name}: min {v.min():.4g} median {np.median(v):.4g} max {v.max():.4g}")


if __name__ == "__main__":
    main()
