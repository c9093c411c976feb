#!/usr/bin/env python3
"""Writes a large kilter profile for measuring load time and memory, without fitting one.

Fitting a million-row profile costs the in-sample neighbour search (n^2 d work), which is
not what this measures. The script fits a small profile with kilter on rows of the wanted
width, then rewrites it with N seeded Gaussian rows in the index and raw-row sections and
plausible LOF and calibration sections, keeping the fitted embedding and covariance from
the small fit, and recomputes the checksum. The result loads and scores like any profile;
its scores are not meaningful and are not checked.

    python3 benches/big_profile.py --kilter target/release/kilter --rows 1000000 --dim 64 \\
        --out /tmp/big.kprofile

Needs numpy. Format: src/profile/format.rs (signature, u32 version, u64 header length,
JSON header, little-endian f64 sections in the header's order, the CRC-32 of the
feature_rows section, then the CRC-32 of every byte before it but that section's).
"""
import argparse
import json
import os
import struct
import subprocess
import tempfile
import zlib

import numpy as np

SIGNATURE = b"\x89KLTPROF\r\n\x1a\n"


def read_profile(path):
    data = open(path, "rb").read()
    assert data[:12] == SIGNATURE, "not a kilter profile"
    version, header_len = struct.unpack("<IQ", data[12:24])
    header = json.loads(data[24:24 + header_len])
    return version, header


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--kilter", default="target/release/kilter")
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--dim", type=int, default=64)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", required=True)
    parser.add_argument("--queries", help="also write this many query rows to this .npy", nargs=2,
                        metavar=("N", "FILE"))
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory() as work:
        small = os.path.join(work, "small.npy")
        np.save(small, rng.standard_normal((2000, args.dim)))
        profile = os.path.join(work, "small.kprofile")
        subprocess.run([args.kilter, "--quiet", "fit", "--reference", small, "--out", profile,
                        "--holdout", "0.2"], check=True)
        version, header = read_profile(profile)
    n, d = args.rows, args.dim
    p = len(header["feature_names"])
    header["fitted_rows"] = n
    header["reference_rows"] = n + n // 4
    header["written_by"] += " (resized by benches/big_profile.py)"
    n_cal = n // 4
    k_distance = np.abs(rng.standard_normal(n)) + 1.0
    sections = {
        "index_rows": None,  # written in pieces below
        "lof_k_distance": k_distance,
        "lof_density": 1.0 / k_distance,
        "calibration_mahalanobis": np.sort(rng.chisquare(d, n_cal)),
        "calibration_knn": np.sort(np.abs(rng.standard_normal(n_cal)) + 2.0),
        "feature_rows": None,
        "feature_location": np.zeros(p),
        "feature_covariance": np.eye(p).ravel(),
    }
    lengths = {"index_rows": n * d, "feature_rows": n * p}
    for s in header["sections"]:
        s["len"] = lengths.get(s["name"], None) or len(sections[s["name"]])
    header_bytes = json.dumps(header).encode()
    crc = {"main": 0, "feature_rows": 0}
    with open(args.out + ".tmp", "wb") as out:
        def put(b, into="main"):
            crc[into] = zlib.crc32(b, crc[into])
            out.write(b)
        put(SIGNATURE + struct.pack("<IQ", version, len(header_bytes)) + header_bytes)
        for s in header["sections"]:
            into = "feature_rows" if s["name"] == "feature_rows" else "main"
            if sections[s["name"]] is None:
                width = d if s["name"] == "index_rows" else p
                for start in range(0, n, 65536):
                    rows = rng.standard_normal((min(65536, n - start), width))
                    put(rows.astype("<f8").tobytes(), into)
            else:
                put(np.asarray(sections[s["name"]], dtype="<f8").tobytes(), into)
        put(struct.pack("<I", crc["feature_rows"] & 0xFFFFFFFF))
        out.write(struct.pack("<I", crc["main"] & 0xFFFFFFFF))
    os.replace(args.out + ".tmp", args.out)
    print(f"wrote {args.out}: {n} x {d} index rows, {os.path.getsize(args.out) / 1e6:.0f} MB")
    if args.queries:
        count, path = int(args.queries[0]), args.queries[1]
        np.save(path, rng.standard_normal((count, p)))


if __name__ == "__main__":
    main()
