#!/usr/bin/env python3
"""Writes the seed corpora of the fuzz targets into fuzz/seeds/<target>/.

Usage: python3 fuzz/make_seeds.py PATH/TO/kilter

The seeds are small real inputs taken from the open iris corpus
(reference-corpora/iris.csv, every fifth row): the CSV as it is, quoted, and with a BOM
and CRLF line ends; the same rows as .npy files (<f8 version 1, <f4 version 2, written
by hand in NumPy's documented layout, so that NumPy is not needed); two profiles fitted
from them by the given kilter binary, each in both modes of the profile target; and
answer lines of the model line protocol (SPEC) for each request shape the line target
decodes. Standard library only.
"""

import os
import struct
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
IRIS = os.path.join(HERE, "..", "reference-corpora", "iris.csv")


def write(target, name, data):
    path = os.path.join(HERE, "seeds", target, name)
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "wb") as f:
        f.write(data)


def npy(rows, descr, version):
    """A C-order 2-D .npy file (NumPy format description, versions 1.0 and 2.0)."""
    header = "{'descr': '%s', 'fortran_order': False, 'shape': (%d, %d), }" % (
        descr, len(rows), len(rows[0]))
    length_bytes = 2 if version == 1 else 4
    preamble = 6 + 2 + length_bytes
    pad = (-(preamble + len(header) + 1)) % 64
    header = (header + " " * pad + "\n").encode("ascii")
    length = struct.pack("<H" if version == 1 else "<I", len(header))
    fmt = "<d" if descr == "<f8" else "<f"
    body = b"".join(struct.pack(fmt, v) for row in rows for v in row)
    return b"\x93NUMPY" + bytes([version, 0]) + length + header + body


def main():
    kilter = sys.argv[1]
    with open(IRIS) as f:
        lines = f.read().splitlines()
    subset = [lines[0]] + lines[1::5]
    csv_text = "\n".join(subset) + "\n"
    # Mode byte 0: no dropped columns; 1: an "id" and a "label" column dropped.
    write("csv_matrix", "iris", b"\x00" + csv_text.encode())
    quoted = "\n".join(",".join('"%s"' % c for c in line.split(",")) for line in subset)
    write("csv_matrix", "iris_quoted", b"\x00" + quoted.encode())
    write("csv_matrix", "iris_bom_crlf", b"\x00\xef\xbb\xbf" + "\r\n".join(subset).encode())
    labelled = ["id," + subset[0].replace("species", "label")]
    labelled += ["%d,%s" % (i, line) for i, line in enumerate(subset[1:])]
    write("csv_matrix", "iris_id_label", b"\x01" + "\n".join(labelled).encode())

    rows = [[float(v) for v in line.split(",")[:4]] for line in subset[1:]]
    write("npy_matrix", "iris_f8_v1.npy", npy(rows, "<f8", 1))
    write("npy_matrix", "iris_f4_v2.npy", npy(rows[:5], "<f4", 2))

    with tempfile.TemporaryDirectory() as tmp:
        csv_path = os.path.join(tmp, "iris30.csv")
        with open(csv_path, "w") as f:
            f.write(csv_text)
        fits = {
            "standardize_lw_k3": ["--k", "3"],
            "pca2_empirical_k2_in_sample": ["--k", "2", "--embed", "pca:2",
                                            "--covariance", "empirical", "--holdout", "0"],
        }
        for name, flags in fits.items():
            out = os.path.join(tmp, name + ".kprofile")
            subprocess.run([kilter, "fit", "--reference", csv_path, "--label-column",
                            "species", "--out", out] + flags, check=True,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            with open(out, "rb") as f:
                profile = f.read()
            # Mode byte 0: bytes as they are; 1: the checksum recomputed after mutation.
            write("profile_bytes", name + "_as_is", b"\x00" + profile)
            write("profile_bytes", name + "_crc_fixed", b"\x01" + profile)

    # Request byte: rows - 1 in bits 0-2, features - 1 in bits 3-5, bit 6 asks gradients.
    answers = {
        "one_row": (0, b'{"outputs": [[0.25, 0.75]]}\n'),
        "two_rows_gradients": (1 | (2 << 3) | 64,
                               b'{"outputs": [[0.1], [0.9]], "gradients": '
                               b'[[1.0, -2.0, 0.5], [0.0, 1e-3, 3]]}\n'),
        "regression_numbers": (2, b'{"outputs": [1.5, -2, 3e2]}'),
        "error": (0, b'{"error": "the model cannot load its weights"}\n'),
    }
    for name, (request, line) in answers.items():
        write("line_protocol", name, bytes([request]) + line)


if __name__ == "__main__":
    main()
