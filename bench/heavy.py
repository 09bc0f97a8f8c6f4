#!/usr/bin/env python3
"""anomark's heavier detectors against their scikit-learn counterparts (scripts/bench-heavy).

    python3 bench/heavy.py specs N [N ...]            # write bench/data/heavy_<det>_N.yaml
    python3 bench/heavy.py run --anomark BIN --key KEY --repeats R N [N ...]
    python3 bench/heavy.py sklearn METHOD DATA.csv OUT.npz [settings]   # one timed worker

Detectors (anomark name -> scikit-learn counterpart):
  robust-gaussian   -> MinCovDet(random_state=0).fit(train).mahalanobis(val+test)
  gaussian-mixture  -> GaussianMixture(k, covariance_type="full", init_params="k-means++",
                       n_init=3, random_state=0) for k in k-min..k-max, lowest BIC
                       (ties to the smaller k); score -score_samples(val+test)
  knn-distance      -> NearestNeighbors(n_neighbors=k) on train-standardised features;
                       distance to the k-th neighbour of each val+test row

Both sides fit on the rows with split == "train" and score the validation and
test rows, on features f00..f15 as they are. anomark is timed as the whole
`anomark run SPEC --key KEY --out OUT --open-test --no-wall-clock` process;
scikit-learn as fit + score inside the worker (its process wall time and
peak memory are recorded too). The sanity check computes, with scikit-learn
for both, ROC AUC on the test rows from each side's scores (anomark's from
OUT/scores.csv, matched to the worker's by id = row_id), and the Spearman rank
correlation of the two score vectors on validation + test.
"""
import argparse
import json
import re
import shutil
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

FEATURES = ["f%02d" % j for j in range(16)]
DETECTORS = ("robust-gaussian", "gaussian-mixture", "knn-distance")


def settings_args(ap):
    ap.add_argument("--detectors", default=",".join(DETECTORS),
                    help="comma-separated subset of %s (default: all)" % ", ".join(DETECTORS))
    ap.add_argument("--knn-k", type=int, default=5)
    ap.add_argument("--gmm-k-min", type=int, default=1)
    ap.add_argument("--gmm-k-max", type=int, default=5)
    ap.add_argument("--anomark-seed", type=int, default=1, help="seed of anomark's robust-gaussian and gaussian-mixture")
    ap.add_argument("--sklearn-seed", type=int, default=0, help="random_state of MinCovDet and GaussianMixture")
    ap.add_argument("--knn-jobs", type=int, default=-1, help="NearestNeighbors n_jobs (anomark searches on all cores)")
    ap.add_argument("--knn-algorithm", default="auto", help="NearestNeighbors algorithm (auto picks brute above 15 features)")
    ap.add_argument("--blas-threads", type=int, default=1,
                    help="OPENBLAS_NUM_THREADS and MKL_NUM_THREADS of the scikit-learn worker (default 1; "
                         "0 leaves the libraries' own choice); OpenMP threads are left alone")
    ap.add_argument("--gmm-tol", type=float, default=1e-9,
                    help="GaussianMixture tol (default 1e-9, anomark's EM tolerance; scikit-learn's own is 1e-3)")
    ap.add_argument("--gmm-max-iter", type=int, default=500,
                    help="GaussianMixture max_iter (default 500, anomark's EM cap; scikit-learn's own is 100)")
    ap.add_argument("--bootstrap", type=int, default=None, help="anomark bootstrap replicates (default: its own)")


def detector_yaml(det, a):
    if det == "robust-gaussian":
        return "  - robust-gaussian: {seed: %d}" % a.anomark_seed
    if det == "gaussian-mixture":
        return "  - gaussian-mixture: {k-min: %d, k-max: %d, seed: %d}" % (a.gmm_k_min, a.gmm_k_max, a.anomark_seed)
    if det == "knn-distance":
        return "  - knn-distance: {k: %d}" % a.knn_k
    raise ValueError(det)


def spec_paths(data_dir, n, det):
    stem = "heavy_%s_%d" % (det, n)
    return data_dir / (stem + ".yaml"), data_dir / (stem + ".test-ledger.jsonl"), data_dir / "out" / stem


# ---------------------------------------------------------------------------
# specs
# ---------------------------------------------------------------------------
def write_specs(a):
    from compare import DATA
    for n in a.sizes:
        for det in chosen_detectors(a):
            spec, ledger, _ = spec_paths(DATA, n, det)
            lines = [
                "# Written by scripts/bench-heavy; paths are relative to this file.",
                "format: 1",
                "data:",
                "  path: data_%d.csv" % n,
                "  id-column: row_id",
                "  label: {column: label, normal: 0, anomaly: 1}",
                "  features: [%s]" % ", ".join(FEATURES),
                "split:",
                "  from-column: split",
                "detectors:",
                detector_yaml(det, a),
                "threshold: max-f1",
            ]
            if a.bootstrap is not None:
                lines.append("bootstrap: {replicates: %d, seed: 1}" % a.bootstrap)
            lines += [
                "card:",
                "  title: Benchmark, %s on synthetic correlated Gaussian data (N = %d)" % (det, n),
                "  owner: anomark benchmark",
                "  intended-use: Timing anomark's %s against scikit-learn on synthetic data." % det,
                "  out-of-scope-uses: [Any real screening decision.]",
                "ledger: %s" % ledger.name,
            ]
            spec.write_text("\n".join(lines) + "\n")
            print(spec.relative_to(HERE.parent))


# ---------------------------------------------------------------------------
# the scikit-learn worker (its own process, so its wall time and RSS are its own)
# ---------------------------------------------------------------------------
def sklearn_worker(a):
    t0 = time.perf_counter()
    import numpy as np
    import polars as pl
    import sklearn
    from sklearn.covariance import MinCovDet
    from sklearn.mixture import GaussianMixture
    from sklearn.neighbors import NearestNeighbors
    t_import = time.perf_counter() - t0

    t0 = time.perf_counter()
    df = pl.read_csv(a.data)
    X = df.select(FEATURES).to_numpy().astype(np.float64, copy=False)
    split = df["split"].to_numpy()
    row_id = df["row_id"].to_numpy()
    tr = split == "train"
    ev = (split == "validation") | (split == "test")
    Xtr, Xev = np.ascontiguousarray(X[tr]), np.ascontiguousarray(X[ev])
    t_read = time.perf_counter() - t0

    info = {"method": a.method, "train_rows": int(tr.sum()), "scored_rows": int(ev.sum()),
            "sklearn": sklearn.__version__}
    try:
        from threadpoolctl import threadpool_info
        info["threadpools"] = [{k: p.get(k) for k in ("internal_api", "num_threads")} for p in threadpool_info()]
    except ImportError:
        pass
    t0 = time.perf_counter()
    if a.method == "robust-gaussian":
        model = MinCovDet(random_state=a.sklearn_seed).fit(Xtr)
        t1 = time.perf_counter()
        score = model.mahalanobis(Xev)  # squared Mahalanobis distance: higher = more anomalous
        _, logdet = np.linalg.slogdet(model.covariance_)
        info.update(raw_support=int(model.raw_support_.sum()), reweighted_rows=int(model.support_.sum()),
                    ln_det_covariance=float(logdet))
    elif a.method == "gaussian-mixture":
        import warnings
        from sklearn.exceptions import ConvergenceWarning
        warnings.simplefilter("ignore", ConvergenceWarning)  # recorded below as n_iter_by_k
        best, bics, iters = None, {}, {}
        for k in range(a.gmm_k_min, a.gmm_k_max + 1):
            g = GaussianMixture(n_components=k, covariance_type="full", init_params="k-means++", n_init=3,
                                tol=a.gmm_tol, max_iter=a.gmm_max_iter, random_state=a.sklearn_seed).fit(Xtr)
            iters[k] = int(g.n_iter_)
            bics[k] = float(g.bic(Xtr))
            if best is None or bics[k] < bics[best[0]]:  # strict: ties to the smaller k
                best = (k, g)
        model = best[1]
        t1 = time.perf_counter()
        score = -model.score_samples(Xev)  # -ln p(x)
        info.update(k=best[0], bic_by_k=bics, n_iter_by_k=iters, converged=bool(model.converged_),
                    tol=a.gmm_tol, max_iter=a.gmm_max_iter)
    elif a.method == "knn-distance":
        mu, sd = Xtr.mean(axis=0), Xtr.std(axis=0)
        model = NearestNeighbors(n_neighbors=a.knn_k, algorithm=a.knn_algorithm, n_jobs=a.knn_jobs).fit((Xtr - mu) / sd)
        t1 = time.perf_counter()
        dist, _ = model.kneighbors((Xev - mu) / sd)
        score = dist[:, -1]  # r_k: higher = more anomalous
        info.update(k=a.knn_k, n_jobs=a.knn_jobs, algorithm=model._fit_method)
    else:
        raise SystemExit("unknown method %r" % a.method)
    t2 = time.perf_counter()
    np.savez(a.out, row_id=row_id[ev], score=score)
    info.update(import_s=t_import, read_s=t_read, fit_s=t1 - t0, score_s=t2 - t1, fit_score_s=t2 - t0)
    print(json.dumps(info))


# ---------------------------------------------------------------------------
# the driver
# ---------------------------------------------------------------------------
def worker_env(a):
    import os
    env = dict(os.environ)
    if a.blas_threads > 0:
        for var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            env[var] = str(a.blas_threads)
    return env


def anomark_env():
    """anomark's environment, with the in-process stage times on stderr."""
    import os
    env = dict(os.environ)
    env["ANOMARK_STAGE_TIMES"] = "1"
    return env


def anomark_fit_score(stderr):
    """anomark's own fit + score time (s): the sum of its timed parts `fitting`,
    `validation scores` and `test scores` (ANOMARK_STAGE_TIMES=1 lines
    `anomark: stage T s    NAME`), the same work as scikit-learn's fit+score."""
    total, seen = 0.0, set()
    for line in stderr.splitlines():
        m = re.match(r"anomark: stage ([0-9.]+) s\s+(fitting|validation scores|test scores)\s*$", line)
        if m:
            total += float(m.group(1))
            seen.add(m.group(2))
    if seen != {"fitting", "validation scores", "test scores"}:
        raise SystemExit("anomark's stage times lack %s" % sorted({"fitting", "validation scores", "test scores"} - seen))
    return total


def worker_cmd(a, det, data, out):
    cmd = [sys.executable, str(Path(__file__).resolve()), "sklearn", det, str(data), str(out),
           "--knn-k", str(a.knn_k), "--gmm-k-min", str(a.gmm_k_min), "--gmm-k-max", str(a.gmm_k_max),
           "--sklearn-seed", str(a.sklearn_seed), "--knn-jobs", str(a.knn_jobs),
           "--knn-algorithm", a.knn_algorithm, "--gmm-tol", repr(a.gmm_tol), "--gmm-max-iter", str(a.gmm_max_iter)]
    return cmd


def sanity(outdir, npz_path, det):
    import numpy as np
    import polars as pl
    from scipy.stats import spearmanr
    from sklearn.metrics import roc_auc_score
    from compare import anomark_candidates

    sc = pl.read_csv(outdir / "scores.csv")
    cand_col = sc.columns[3]
    z = np.load(npz_path)
    sk = pl.DataFrame({"id": z["row_id"], "sk": z["score"]})
    j = sc.select(pl.col("id").cast(pl.Int64), "split", "label", pl.col(cand_col).alias("am")) \
        .join(sk.with_columns(pl.col("id").cast(pl.Int64)), on="id", how="inner")
    test = j.filter(pl.col("split") == "test")
    y = test["label"].to_numpy()
    rec, cands = anomark_candidates(outdir / "run.json")
    params = cands[0]["params"] or {}
    out = {
        "candidate": cand_col,
        "rows_anomark": sc.height, "rows_sklearn": int(len(z["score"])), "rows_matched": j.height,
        "test_rows": test.height, "test_anomalies": int(y.sum()),
        "test_auc_anomark": float(roc_auc_score(y, test["am"].to_numpy())),
        "test_auc_sklearn": float(roc_auc_score(y, test["sk"].to_numpy())),
        "test_auc_anomark_reported": cands[0]["test_roc_auc"],
        "spearman_val_test": float(spearmanr(j["am"].to_numpy(), j["sk"].to_numpy()).statistic),
        "anomark_train": rec.get("split", {}).get("counts", {}).get("train"),
    }
    if det == "gaussian-mixture":
        out["anomark_k"] = params.get("k")
        out["anomark_bic_by_k"] = params.get("bic-by-k")
    elif det == "robust-gaussian":
        out["anomark_support"] = params.get("support")
        out["anomark_reweighted_rows"] = params.get("reweighted-rows")
        out["anomark_ln_det_covariance"] = params.get("ln-det-covariance")
    elif det == "knn-distance":
        out["anomark_k"] = params.get("k")
    return out


def chosen_detectors(a):
    dets = [d.strip() for d in a.detectors.split(",") if d.strip()]
    bad = [d for d in dets if d not in DETECTORS]
    if bad or not dets:
        raise SystemExit("--detectors: unknown %s (choose from %s)" % (", ".join(bad) or "(none)", ", ".join(DETECTORS)))
    return dets


def run(a):
    from compare import (DATA, RESULTS, fmt, fmt_ratio, have_gnu_time, log, machine_info, machine_markdown, must,
                         ratio, stats3, table, timed)
    RESULTS.mkdir(parents=True, exist_ok=True)
    dets = chosen_detectors(a)
    use_gnu_time = have_gnu_time()
    machine = machine_info(a.anomark)
    docs = []
    for n in a.sizes:
        data = DATA / ("data_%d.csv" % n)
        reps = {det: {"anomark": [], "sklearn": []} for det in dets}
        for i in range(a.repeats):
            for det in dets:
                spec, ledger, outdir = spec_paths(DATA, n, det)
                outdir.parent.mkdir(parents=True, exist_ok=True)
                shutil.rmtree(outdir, ignore_errors=True)
                ledger.unlink(missing_ok=True)
                log("N=%d rep %d/%d: anomark %s ..." % (n, i + 1, a.repeats, det))
                r = must(timed([a.anomark, "run", spec, "--key", a.key, "--out", outdir, "--open-test",
                                "--no-wall-clock"], use_gnu_time=use_gnu_time, env=anomark_env()),
                         "anomark run %s" % spec)
                r["fit_score_s"] = anomark_fit_score(r["stderr"])
                log("    %.3f s (fit+score %.3f s), %s MiB" % (r["wall_s"], r["fit_score_s"], fmt(r["rss_mib"], 1)))
                r["stdout"], r["stderr"] = r["stdout"][-2000:], r["stderr"][-2000:]
                reps[det]["anomark"].append(r)

                npz = outdir.parent / ("sklearn_%s_%d.npz" % (det, n))
                log("N=%d rep %d/%d: sklearn %s ..." % (n, i + 1, a.repeats, det))
                r = must(timed(worker_cmd(a, det, data, npz), use_gnu_time=use_gnu_time, env=worker_env(a)),
                         "sklearn worker %s" % det)
                r["worker"] = json.loads(r["stdout"].strip().splitlines()[-1])
                log("    %.3f s (fit+score %.3f s), %s MiB" % (r["wall_s"], r["worker"]["fit_score_s"],
                                                             fmt(r["rss_mib"], 1)))
                r["stdout"], r["stderr"] = "", r["stderr"][-2000:]
                reps[det]["sklearn"].append(r)
        summary, checks = {}, {}
        for det in dets:
            A, S = reps[det]["anomark"], reps[det]["sklearn"]
            summary[det] = {
                "anomark_wall_s": stats3([r["wall_s"] for r in A]),
                "anomark_fit_score_s": stats3([r["fit_score_s"] for r in A]),
                "anomark_rss_mib": stats3([r["rss_mib"] for r in A]),
                "sklearn_fit_score_s": stats3([r["worker"]["fit_score_s"] for r in S]),
                "sklearn_wall_s": stats3([r["wall_s"] for r in S]),
                "sklearn_rss_mib": stats3([r["rss_mib"] for r in S]),
                "sklearn_read_s": stats3([r["worker"]["read_s"] for r in S]),
            }
            _, _, outdir = spec_paths(DATA, n, det)
            checks[det] = sanity(outdir, outdir.parent / ("sklearn_%s_%d.npz" % (det, n)), det)
            checks[det]["sklearn"] = S[-1]["worker"]
        doc = {"n": n, "repeats": a.repeats, "data": str(data.relative_to(HERE.parent)),
               "settings": {"knn_k": a.knn_k, "gmm_k_min": a.gmm_k_min, "gmm_k_max": a.gmm_k_max,
                            "anomark_seed": a.anomark_seed, "sklearn_seed": a.sklearn_seed,
                            "knn_jobs": a.knn_jobs, "knn_algorithm": a.knn_algorithm, "blas_threads": a.blas_threads, "gmm_tol": a.gmm_tol,
                            "gmm_max_iter": a.gmm_max_iter, "bootstrap": a.bootstrap},
               "machine": machine, "summary": summary, "sanity": checks, "runs": reps}
        (RESULTS / ("heavy_%d.json" % n)).write_text(json.dumps(doc, indent=1, default=str) + "\n")
        docs.append(doc)

    parts = ["# anomark heavy detectors vs scikit-learn", "", machine_markdown(machine), ""]
    parts += ["## Time and peak memory (%d repetition%s, interleaved; median [min, max])" %
              (a.repeats, "" if a.repeats == 1 else "s"), ""]
    mm = lambda s, d=3: "%s [%s, %s]" % (fmt(s["median"], d), fmt(s["min"], d), fmt(s["max"], d))
    rows = []
    for d in docs:
        for det in dets:
            s = d["summary"][det]
            rows.append(["{:,}".format(d["n"]), det, mm(s["anomark_fit_score_s"]), mm(s["sklearn_fit_score_s"]),
                         mm(s["anomark_wall_s"]), mm(s["sklearn_wall_s"]), mm(s["anomark_rss_mib"], 1),
                         mm(s["sklearn_rss_mib"], 1)])
    parts.append(table(["N", "detector", "anomark fit+score s", "sklearn fit+score s", "anomark process wall s",
                        "sklearn process wall s", "anomark RSS MiB", "sklearn RSS MiB"], rows))
    parts += ["", "fit+score is each side's own clock around the same work: fitting on the training rows "
              "and scoring the validation and test rows (anomark: its timed parts `fitting`, "
              "`validation scores` and `test scores`). Process wall time is the whole process: for "
              "anomark the whole run (read, hash, split, leakage proof, fit, threshold, test, metrics "
              "with bootstrap intervals, card, signing), for scikit-learn Python's start-up, imports, "
              "the CSV read, fit and score.", ""]
    pools = docs[0]["sanity"][dets[0]]["sklearn"].get("threadpools") if docs else None
    parts += ["scikit-learn worker thread pools: %s; NearestNeighbors n_jobs %s, algorithm %s; "
              "GaussianMixture tol %g, max_iter %d (anomark's EM: tolerance 1e-9 on the mean "
              "log-likelihood, at most 500 iterations)." % (
                  ", ".join("%s %s threads" % (p["internal_api"], p["num_threads"]) for p in pools)
                  if pools else "unknown", a.knn_jobs, a.knn_algorithm, a.gmm_tol, a.gmm_max_iter), ""]
    parts += ["## Ratios of medians", ""]
    rows = []
    for d in docs:
        for det in dets:
            s = d["summary"][det]
            aw = s["anomark_wall_s"]["median"]
            rows.append(["{:,}".format(d["n"]), det,
                         fmt_ratio(ratio(s["sklearn_fit_score_s"]["median"], s["anomark_fit_score_s"]["median"])),
                         fmt_ratio(ratio(s["sklearn_wall_s"]["median"], aw)),
                         fmt_ratio(ratio(s["sklearn_fit_score_s"]["median"], aw)),
                         fmt_ratio(ratio(s["sklearn_rss_mib"]["median"], s["anomark_rss_mib"]["median"]))])
    parts.append(table(["N", "detector", "fit+score: sklearn / anomark", "process: sklearn / anomark",
                        "sklearn fit+score / anomark whole process", "sklearn RSS / anomark RSS"], rows))
    parts += ["", "## Sanity: test ROC AUC (sklearn.metrics on each side's scores) and agreement", ""]
    rows = []
    for d in docs:
        for det in dets:
            c = d["sanity"][det]
            sk = c["sklearn"]
            if det == "gaussian-mixture":
                note = "k: anomark %s, sklearn %s; sklearn EM iterations by k: %s" % (
                    c.get("anomark_k"), sk.get("k"),
                    ", ".join("%s:%s" % kv for kv in (sk.get("n_iter_by_k") or {}).items()))
            elif det == "robust-gaussian":
                note = "h: anomark %s, sklearn %s; reweighted rows: %s, %s; ln det Σ: %s, %s" % (
                    c.get("anomark_support"), sk.get("raw_support"), c.get("anomark_reweighted_rows"),
                    sk.get("reweighted_rows"), fmt(c.get("anomark_ln_det_covariance"), 3),
                    fmt(sk.get("ln_det_covariance"), 3))
            else:
                note = "k %s, sklearn search %s" % (c.get("anomark_k"), sk.get("algorithm"))
            tr = c.get("anomark_train") or {}
            same_train = tr.get("normal", None)
            rows.append(["{:,}".format(d["n"]), det, "%d (%d anomalies)" % (c["test_rows"], c["test_anomalies"]),
                         fmt(c["test_auc_anomark"], 6), fmt(c["test_auc_anomark_reported"], 6),
                         fmt(c["test_auc_sklearn"], 6), fmt(c["spearman_val_test"], 6),
                         "%s / %s" % (same_train, sk["train_rows"]),
                         "%d / %d / %d" % (c["rows_anomark"], c["rows_sklearn"], c["rows_matched"]), note])
    parts.append(table(["N", "detector", "test rows", "AUC anomark", "AUC anomark (run.json)", "AUC sklearn",
                        "Spearman val+test", "train rows anomark / sklearn", "scored rows anomark / sklearn / matched",
                        "fitted"], rows))
    parts.append("")
    parts.append("Raw records: %s" % ", ".join("bench/results/heavy_%d.json" % d["n"] for d in docs))
    print("\n".join(parts))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    p = sub.add_parser("specs")
    settings_args(p)
    p.add_argument("sizes", nargs="+", type=int)
    p = sub.add_parser("run")
    settings_args(p)
    p.add_argument("--anomark", required=True)
    p.add_argument("--key", required=True)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("sizes", nargs="+", type=int)
    p = sub.add_parser("sklearn")
    settings_args(p)
    p.add_argument("method", choices=DETECTORS)
    p.add_argument("data")
    p.add_argument("out")
    a = ap.parse_args(argv)
    {"specs": write_specs, "run": run, "sklearn": sklearn_worker}[a.cmd](a)


if __name__ == "__main__":
    main()
