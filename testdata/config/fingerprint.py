#!/usr/bin/python3
"""Model fingerprints of the discrete test plants, computed independently of the Go code.

Run from the repository root with Debian's python3 (python3-yaml):

    /usr/bin/python3 testdata/config/fingerprint.py

It writes testdata/config/fingerprints.json. The encoding is the one documented on
config.Fingerprint, written here from that description alone: the bytes
"surmise-model-fingerprint-v1\\n"; n, m, p as unsigned 64-bit big-endian integers; the entries
of A, B, C and D row by row as big-endian IEEE 754 float64 bits (-0 written as +0; D is zeros
when the file omits it); the sample time in seconds as float64 bits; then each state, input and
output name as its byte length (uint64) followed by its UTF-8 bytes. The digest is SHA-256,
written "sha256:" + lowercase hex. Only discrete-time plant files are listed: their matrices
are the file's numbers, so no discretisation is involved.
"""
import hashlib
import json
import os
import re
import struct

import yaml

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
FILES = [
    "testdata/config/double-integrator.yaml",
    "testdata/plants/hotwater-loop-discrete.yaml",
]
UNITS = {"ns": 1e-9, "us": 1e-6, "ms": 1e-3, "s": 1.0}


def seconds(duration):
    # the plain "<number><unit>" durations the test plants use
    num, unit = re.fullmatch(r"([0-9.]+)(ns|us|ms|s)", duration).groups()
    nanos = int(round(float(num) * UNITS[unit] * 1e9))
    return nanos / 1e9  # as Go's time.Duration.Seconds does for whole seconds below 2^53 ns


def fingerprint(plant):
    model = plant["model"]
    a = [[float(x) for x in row] for row in model["A"]]
    b = [[float(x) for x in row] for row in model["B"]]
    c = [[float(x) for x in row] for row in model["C"]]
    n, m, p = len(a), len(b[0]), len(c)
    d = [[float(x) for x in row] for row in model.get("D", [[0.0] * m for _ in range(p)])]
    h = hashlib.sha256()
    h.update(b"surmise-model-fingerprint-v1\n")
    for k in (n, m, p):
        h.update(struct.pack(">Q", k))
    for mat in (a, b, c, d):
        for row in mat:
            for x in row:
                h.update(struct.pack(">d", 0.0 if x == 0 else x))
    h.update(struct.pack(">d", seconds(model["sample"])))
    for section in ("states", "inputs", "outputs"):
        for s in plant[section]:
            name = s["name"].encode("utf-8")
            h.update(struct.pack(">Q", len(name)))
            h.update(name)
    return "sha256:" + h.hexdigest()


def main():
    out = {}
    for f in FILES:
        with open(os.path.join(ROOT, f)) as fh:
            plant = yaml.safe_load(fh)
        assert plant["model"]["time"] == "discrete"
        out[f] = fingerprint(plant)
        print(f, out[f])
    with open(os.path.join(ROOT, "testdata/config/fingerprints.json"), "w") as fh:
        json.dump(out, fh, indent=2, sort_keys=True)
        fh.write("\n")


if __name__ == "__main__":
    main()
