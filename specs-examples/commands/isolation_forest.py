#!/usr/bin/env python3
"""An isolation forest (scikit-learn) as an external detector for anomark.

Contract (CSV): the exchange folder, given as the last argument and in
ANOMARK_EXCHANGE, holds `train.csv` and `rows.csv` (a header of feature
names, then numbers); this program writes `scores.csv` (the header `score`,
then one number per row of `rows.csv`, in order; higher is more anomalous).

The forest is seeded (`--seed`, default 1) and fitted on the training rows
sorted lexicographically, so its scores depend on neither the order in which
anomark lists the rows nor the run: a requirement of anomark's protocol,
which runs the program again to verify a card. The score is the negated
`score_samples` of scikit-learn's IsolationForest (the average path length
score of Liu, Ting and Zhou, 2008), so that higher means more anomalous.
"""

import os
import sys

import numpy as np
from sklearn.ensemble import IsolationForest


def read(path):
    return np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2, dtype=np.float64)


def forest_scores(train, rows, seed, trees):
    train = train[np.lexsort(train.T[::-1])]
    forest = IsolationForest(n_estimators=trees, random_state=seed).fit(train)
    return -forest.score_samples(rows)


def main():
    args = sys.argv[1:]
    folder = args[-1]
    seed = int(args[args.index("--seed") + 1]) if "--seed" in args else 1
    trees = int(args[args.index("--trees") + 1]) if "--trees" in args else 100
    train = read(os.path.join(folder, "train.csv"))
    rows = read(os.path.join(folder, "rows.csv"))
    scores = forest_scores(train, rows, seed, trees) if len(rows) else []
    with open(os.path.join(folder, "scores.csv"), "w") as f:
        f.write("score\n")
        for s in scores:
            f.write(repr(float(s)) + "\n")


if __name__ == "__main__":
    main()
