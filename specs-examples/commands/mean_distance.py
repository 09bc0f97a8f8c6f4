#!/usr/bin/env python3
"""An external detector for anomark, with the Python standard library only.

The score of a row is its distance to the training rows' mean in standard
units: the square root of the sum over features of ((x - mean) / sd)^2, with
the population standard deviation of the training rows. It reads the CSV
contract: the exchange folder (last argument, also in ANOMARK_EXCHANGE) holds
`train.csv` and `rows.csv` (a header of feature names, then numbers) and it
writes `scores.csv` (the header `score`, then one number per row of
`rows.csv`, in order).

`--copy-to DIR` copies the two input files into DIR, so that a test can read
what the program was given. `--fail MODE` breaks the contract on purpose, for anomark's tests: `exit`
(status 2 after a message on stderr), `nan`, `count` (one score too few),
`missing` (no scores file), `sleep` (never finishes), `random` (scores that
change from run to run).
"""

import csv
import math
import os
import random
import sys
import time


def read(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], [[float(v) for v in r] for r in rows[1:]]


def main():
    args = sys.argv[1:]
    folder = args[-1]
    if folder != os.environ.get("ANOMARK_EXCHANGE"):
        sys.exit("the folder argument and ANOMARK_EXCHANGE differ")
    fail = args[args.index("--fail") + 1] if "--fail" in args else None
    if "--copy-to" in args:
        keep = args[args.index("--copy-to") + 1]
        os.makedirs(keep, exist_ok=True)
        for name in ("train.csv", "rows.csv"):
            with open(os.path.join(folder, name), "rb") as src:
                with open(os.path.join(keep, name), "wb") as dst:
                    dst.write(src.read())
    names, train = read(os.path.join(folder, "train.csv"))
    _, rows = read(os.path.join(folder, "rows.csv"))
    d = len(names)
    mean = [math.fsum(r[j] for r in train) / len(train) for j in range(d)]
    sd = [
        math.sqrt(math.fsum((r[j] - mean[j]) ** 2 for r in train) / len(train))
        for j in range(d)
    ]
    scores = [
        math.sqrt(math.fsum(((r[j] - mean[j]) / sd[j]) ** 2 for j in range(d)))
        for r in rows
    ]
    if fail == "exit":
        print("mean_distance: refusing on purpose", file=sys.stderr)
        sys.exit(2)
    if fail == "sleep":
        print("mean_distance: sleeping", file=sys.stderr, flush=True)
        time.sleep(3600)
    if fail == "missing":
        return
    if fail == "nan":
        scores[len(scores) // 2] = float("nan")
    if fail == "count":
        scores = scores[:-1]
    if fail == "random":
        scores = [s + random.random() for s in scores]
    with open(os.path.join(folder, "scores.csv"), "w") as f:
        f.write("score\n")
        for s in scores:
            f.write(repr(s) + "\n")


if __name__ == "__main__":
    main()
