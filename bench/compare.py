#!/usr/bin/env python3
"""Timing helper behind scripts/bench (and shared helpers for bench/heavy.py).

    python3 bench/compare.py --anomark BIN --peer DIR --key KEY --repeats R N [N ...]

Expects, for every N, bench/data/data_N.csv and the specs
bench/data/spec_N.yaml (the default run) and bench/data/spec_N_noci.yaml (the
same with `bootstrap: {replicates: 0}`) that `anomark check` has accepted
(scripts/bench prepares them). Runs, R times each and interleaved
(A A0 B C, A A0 B C, ...):

  A   anomark run SPEC --key KEY --out OUT --open-test --no-wall-clock
      (with ANOMARK_STAGE_TIMES=1, for the bootstrap's own time)
  A0  the same on the spec without intervals
  B   python3 PEER/peer_pipeline.py DATA --no-naive
  C   a bare polars read of DATA

measuring process wall time and peak resident memory. Writes the raw records
to bench/results/bench_N.json and prints Markdown tables of medians on stdout;
progress goes to stderr.
"""
import argparse
import json
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "bench" / "data"
RESULTS = ROOT / "bench" / "results"
GNU_TIME = "/usr/bin/time"

POLARS_READ = (
    "import json, sys, time\n"
    "t0 = time.perf_counter()\n"
    "import polars as pl\n"
    "t1 = time.perf_counter()\n"
    "df = pl.read_csv(sys.argv[1])\n"
    "t2 = time.perf_counter()\n"
    "print(json.dumps({'height': df.height, 'import_s': t1 - t0, 'read_s': t2 - t1}))\n"
)


def log(msg):
    print(msg, file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------
# measuring one process
# ---------------------------------------------------------------------------
def have_gnu_time():
    if not os.access(GNU_TIME, os.X_OK):
        return False
    probe = subprocess.run([GNU_TIME, "-v", "true"], capture_output=True, text=True)
    return probe.returncode == 0 and "Maximum resident set size" in probe.stderr


def timed(cmd, cwd=None, use_gnu_time=True, env=None):
    """Run cmd; return dict(rc, wall_s, rss_mib, stdout, stderr, rss_source).

    Wall time is perf_counter around the process. Peak RSS comes from
    `/usr/bin/time -v` when available, else from the rusage that wait4
    returns for this one child (the per-child form of RUSAGE_CHILDREN).
    """
    cmd = [str(c) for c in cmd]
    if use_gnu_time:
        fd, name = tempfile.mkstemp(prefix="anomark-bench-time-", suffix=".txt")
        os.close(fd)
        tfile = Path(name)
        full = [GNU_TIME, "-v", "-o", str(tfile)] + cmd
    else:
        full = cmd
    t0 = time.perf_counter()
    proc = subprocess.Popen(full, cwd=cwd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    # communicate() would reap the child itself; read the pipes, then wait4.
    out, err = proc.communicate() if use_gnu_time else _communicate_wait4(proc)
    wall = time.perf_counter() - t0
    rc = proc.returncode
    rss_kib = None
    if use_gnu_time:
        text = tfile.read_text() if tfile.exists() else ""
        m = re.search(r"Maximum resident set size \(kbytes\):\s*(\d+)", text)
        rss_kib = int(m.group(1)) if m else None
        m = re.search(r"Exit status:\s*(\d+)", text)
        if m:
            rc = int(m.group(1))
        tfile.unlink(missing_ok=True)
        source = "/usr/bin/time -v"
    else:
        rss_kib = proc._bench_maxrss  # set by _communicate_wait4
        source = "wait4 rusage"
    return {"rc": rc, "wall_s": wall, "rss_mib": None if rss_kib is None else rss_kib / 1024.0,
            "stdout": out.decode("utf-8", "replace"), "stderr": err.decode("utf-8", "replace"),
            "rss_source": source}


def _communicate_wait4(proc):
    import threading

    bufs = {}

    def drain(name, fh):
        bufs[name] = fh.read()

    threads = [threading.Thread(target=drain, args=(n, f)) for n, f in (("out", proc.stdout), ("err", proc.stderr))]
    for t in threads:
        t.start()
    _, status, ru = os.wait4(proc.pid, 0)
    for t in threads:
        t.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    proc._bench_maxrss = ru.ru_maxrss  # KiB on Linux
    return bufs["out"], bufs["err"]


def must(res, what):
    if res["rc"] != 0:
        log("FAILED (exit %s): %s\n--- stderr ---\n%s" % (res["rc"], what, res["stderr"][-4000:]))
        sys.exit(1)
    return res


# ---------------------------------------------------------------------------
# small statistics and formatting helpers
# ---------------------------------------------------------------------------
def stats3(values):
    vals = [v for v in values if v is not None]
    if not vals:
        return {"median": None, "min": None, "max": None}
    return {"median": statistics.median(vals), "min": min(vals), "max": max(vals)}


def fmt(x, digits=3):
    if x is None:
        return "n/a"
    if isinstance(x, int):
        return str(x)
    if abs(x) >= 100:
        return "%.1f" % x
    return ("%%.%df" % digits) % x


def fmt_ratio(x):
    """A ratio to three significant digits."""
    return "n/a" if x is None else "%.3g" % x


def ratio(a, b):
    if a is None or b is None or b == 0:
        return None
    return a / b


def table(header, rows):
    out = ["| " + " | ".join(header) + " |", "|" + "|".join(["---"] * len(header)) + "|"]
    for r in rows:
        out.append("| " + " | ".join(str(c) for c in r) + " |")
    return "\n".join(out)


def sh(cmd):
    try:
        return subprocess.run(cmd, shell=True, capture_output=True, text=True).stdout.strip()
    except OSError:
        return ""


def machine_info(anomark_bin):
    model = ""
    for line in sh("lscpu").splitlines():
        if line.startswith("Model name:"):
            model = line.split(":", 1)[1].strip()
            break
    mem_kib = 0
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemTotal:"):
                    mem_kib = int(line.split()[1])
    except OSError:
        pass
    versions = {"python": platform.python_version()}
    for mod in ("numpy", "pandas", "scipy", "sklearn", "polars"):
        try:
            versions[mod if mod != "sklearn" else "scikit-learn"] = __import__(mod).__version__
        except ImportError:
            versions[mod] = "not installed"
    return {
        "nproc": sh("nproc"),
        "cpu_model": model,
        "mem_total_gib": round(mem_kib / 1024 ** 2, 1),
        "kernel": sh("uname -sr"),
        "rustc": sh("rustc --version") or "not found",
        "anomark": sh("'%s' --version" % anomark_bin),
        "python_packages": versions,
        "rss_source": "/usr/bin/time -v" if have_gnu_time() else "wait4 rusage (per child)",
    }


def machine_markdown(m):
    pk = ", ".join("%s %s" % kv for kv in m["python_packages"].items())
    return "\n".join([
        "## Machine",
        "",
        "- CPUs (`nproc`): %s; model: %s" % (m["nproc"], m["cpu_model"] or "unknown"),
        "- memory: %s GiB; kernel: %s" % (m["mem_total_gib"], m["kernel"]),
        "- %s; %s" % (m["rustc"], m["anomark"]),
        "- Python packages: %s" % pk,
        "- peak RSS from: %s; wall time: perf_counter around each process" % m["rss_source"],
    ])


# ---------------------------------------------------------------------------
# reading results
# ---------------------------------------------------------------------------
def confusion_of(metrics):
    c = metrics["confusion"]
    return {"tp": c["tp"], "fp": c["fp"], "fn": c.get("fn", c.get("fn_")), "tn": c["tn"]}


def anomark_candidates(run_json):
    rec = json.loads(Path(run_json).read_text())
    out = []
    for c in rec["candidates"]:
        out.append({"name": c["name"], "detector": c.get("detector"), "chosen": bool(c.get("chosen")),
                    "test": confusion_of(c["test"]) if c.get("test") else None,
                    "test_roc_auc": (c.get("test") or {}).get("roc-auc"),
                    "validation": confusion_of(c["validation"]) if c.get("validation") else None,
                    "validation_f1": (c.get("validation") or {}).get("f1"),
                    "ln_epsilon": c.get("ln-epsilon"),
                    "params": c.get("params")})
    return rec, out


# ---------------------------------------------------------------------------
# the main benchmark
# ---------------------------------------------------------------------------
def bench_one(n, args, use_gnu_time):
    data = DATA / ("data_%d.csv" % n)
    spec = DATA / ("spec_%d.yaml" % n)
    ledger = DATA / ("spec_%d.test-ledger.jsonl" % n)
    outdir = DATA / "out" / ("anomark_%d" % n)
    spec_noci = DATA / ("spec_%d_noci.yaml" % n)
    ledger_noci = DATA / ("spec_%d_noci.test-ledger.jsonl" % n)
    outdir_noci = DATA / "out" / ("anomark_%d_noci" % n)
    outdir.parent.mkdir(parents=True, exist_ok=True)
    peer = Path(args.peer) / "peer_pipeline.py"

    def anomark(spec, ledger, outdir, env=None):
        shutil.rmtree(outdir, ignore_errors=True)
        ledger.unlink(missing_ok=True)
        r = must(timed([args.anomark, "run", spec, "--key", args.key, "--out", outdir,
                        "--open-test", "--no-wall-clock"], use_gnu_time=use_gnu_time, env=env),
                 "anomark run %s" % spec)
        _, cands = anomark_candidates(outdir / "run.json")
        r["candidates"] = cands
        return r

    def run_anomark():
        env = dict(os.environ, ANOMARK_STAGE_TIMES="1")
        r = anomark(spec, ledger, outdir, env)
        # The bootstrap's own time: the parts named `bootstrap` (one per
        # candidate and split; they run side by side, so this is their sum).
        times = [float(m.group(1)) for m in
                 re.finditer(r"anomark: stage ([0-9.]+) s\s+bootstrap(?: \(at [0-9.]+ s\))?$", r["stderr"], re.M)]
        r["bootstrap_s"] = sum(times) if times else None
        r["bootstrap_parts"] = len(times)
        return r

    def run_anomark_noci():
        return anomark(spec_noci, ledger_noci, outdir_noci)

    def run_peer():
        r = must(timed([sys.executable, peer, data, "--no-naive"], use_gnu_time=use_gnu_time),
                 "peer_pipeline.py %s" % data)
        doc = json.loads(r["stdout"])
        r["in_process_s"] = doc["timings_s"]["total"]
        r["n_rows"] = doc["n_rows"]
        r["mvn_test"] = {k: doc["models"]["mvn"]["test"][k] for k in ("tp", "fp", "fn", "tn")}
        r["independent_test"] = {k: doc["models"]["independent"]["test"][k] for k in ("tp", "fp", "fn", "tn")}
        r["timings_s"] = doc["timings_s"]
        r["mvn_log_eps"] = doc["models"]["mvn"]["log_eps"]
        r["mvn_validation_f1"] = doc["models"]["mvn"]["validation_at_eps"]["f1"]
        return r

    def run_polars():
        r = must(timed([sys.executable, "-c", POLARS_READ, data], use_gnu_time=use_gnu_time),
                 "polars read %s" % data)
        doc = json.loads(r["stdout"])
        r["in_process_s"] = doc["read_s"]
        r["import_s"] = doc["import_s"]
        r["height"] = doc["height"]
        return r

    tools = (("anomark", run_anomark), ("anomark-noci", run_anomark_noci), ("peer", run_peer),
             ("polars-read", run_polars))
    reps = {name: [] for name, _ in tools}
    for i in range(args.repeats):
        for name, fn in tools:
            log("N=%d rep %d/%d: %s ..." % (n, i + 1, args.repeats, name))
            r = fn()
            log("    %.3f s, %s MiB" % (r["wall_s"], fmt(r["rss_mib"], 1)))
            # keep the records small: drop bulky streams
            r["stdout"] = r["stdout"][-2000:] if name != "peer" else ""
            r["stderr"] = r["stderr"][-2000:]
            reps[name].append(r)

    summary = {}
    for name in reps:
        summary[name] = {
            "wall_s": stats3([r["wall_s"] for r in reps[name]]),
            "rss_mib": stats3([r["rss_mib"] for r in reps[name]]),
            "in_process_s": stats3([r.get("in_process_s") for r in reps[name]]),
            "bootstrap_s": stats3([r.get("bootstrap_s") for r in reps[name]]),
        }
    n_rows = reps["peer"][0]["n_rows"]
    # agreement: anomark's multivariate-gaussian candidate against the peer's mvn
    an = reps["anomark"][-1]["candidates"]
    chosen = [c for c in an if c["chosen"]]
    mvn = [c for c in an if c["detector"] == "multivariate-gaussian" or c["name"].endswith("multivariate-gaussian")]
    an_mvn = mvn[0]["test"] if mvn else None
    peer_mvn = reps["peer"][-1]["mvn_test"]
    stable = all(r["candidates"] == an for r in reps["anomark"]) and \
        all(r["mvn_test"] == peer_mvn for r in reps["peer"])
    agreement = {
        "anomark_chosen": chosen[0]["name"] if chosen else None,
        "anomark_mvn_is_chosen": bool(mvn and mvn[0]["chosen"]),
        "anomark_mvn_test": an_mvn,
        "peer_mvn_test": peer_mvn,
        "equal": an_mvn == peer_mvn,
        "anomark_mvn_ln_epsilon": mvn[0]["ln_epsilon"] if mvn else None,
        "peer_mvn_log_eps": reps["peer"][-1]["mvn_log_eps"],
        "anomark_mvn_validation_f1": mvn[0]["validation_f1"] if mvn else None,
        "peer_mvn_validation_f1": reps["peer"][-1]["mvn_validation_f1"],
        "stable_across_repeats": stable,
    }
    doc = {"n": n, "rows": n_rows, "repeats": args.repeats, "data": str(data.relative_to(ROOT)),
           "spec": str(spec.relative_to(ROOT)), "summary": summary, "agreement": agreement, "runs": reps}
    return doc


def main(argv=None):
    ap = argparse.ArgumentParser(description="anomark vs peer pipeline vs bare polars read")
    ap.add_argument("--anomark", required=True)
    ap.add_argument("--peer", required=True)
    ap.add_argument("--key", required=True)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("sizes", nargs="+", type=int)
    args = ap.parse_args(argv)
    RESULTS.mkdir(parents=True, exist_ok=True)
    use_gnu_time = have_gnu_time()
    machine = machine_info(args.anomark)
    (RESULTS / "machine.json").write_text(json.dumps(machine, indent=1) + "\n")

    docs = []
    for n in args.sizes:
        doc = bench_one(n, args, use_gnu_time)
        doc["machine"] = machine
        (RESULTS / ("bench_%d.json" % n)).write_text(json.dumps(doc, indent=1) + "\n")
        docs.append(doc)

    print(render(docs, machine, args.repeats))


def render(docs, machine, repeats):
    parts = ["# anomark benchmark", "", machine_markdown(machine), ""]
    parts += ["## Wall time and peak memory (%d repetition%s, interleaved; median [min, max])" %
              (repeats, "" if repeats == 1 else "s"), ""]
    rows = []
    label = {"anomark": "anomark run --open-test (default: 1,000 bootstrap replicates)",
             "anomark-noci": "anomark run --open-test, `bootstrap: {replicates: 0}`",
             "peer": "peer_pipeline.py --no-naive", "polars-read": "bare polars read_csv"}
    for d in docs:
        for name in ("anomark", "anomark-noci", "peer", "polars-read"):
            s = d["summary"][name]
            w, m, ip = s["wall_s"], s["rss_mib"], s["in_process_s"]
            rows.append(["{:,}".format(d["n"]), "{:,}".format(d["rows"]), label[name],
                         "%s [%s, %s]" % (fmt(w["median"]), fmt(w["min"]), fmt(w["max"])),
                         "%s [%s, %s]" % (fmt(m["median"], 1), fmt(m["min"], 1), fmt(m["max"], 1)),
                         "n/a" if ip["median"] is None else
                         "%s [%s, %s]" % (fmt(ip["median"]), fmt(ip["min"]), fmt(ip["max"]))])
    parts.append(table(["N", "rows", "command", "wall s", "peak RSS MiB", "in-process s"], rows))
    parts += ["", "In-process: the peer's `timings_s.total` (read to metrics, no imports); "
              "for the bare read, `pl.read_csv` alone. anomark has no in-process clock with "
              "`--no-wall-clock`: its figure is the whole process.", ""]

    parts += ["## The bootstrap's own time (default run; median [min, max])", ""]
    rows = []
    for d in docs:
        s = d["summary"]
        b = s["anomark"]["bootstrap_s"]
        aw, a0 = s["anomark"]["wall_s"]["median"], s["anomark-noci"]["wall_s"]["median"]
        rows.append(["{:,}".format(d["n"]), "{:,}".format(d["rows"]),
                     "%s [%s, %s]" % (fmt(b["median"]), fmt(b["min"]), fmt(b["max"])),
                     fmt(None if aw is None or a0 is None else aw - a0)])
    parts.append(table(["N", "rows", "bootstrap parts, summed s", "default − no-intervals wall s"], rows))
    parts += ["", "The parts named `bootstrap` under ANOMARK_STAGE_TIMES=1: one per candidate and "
              "split (1,000 replicates each), summed although they run side by side.", ""]

    parts += ["## Ratios of medians", ""]
    rows = []
    for d in docs:
        s = d["summary"]
        aw, pw, rw = (s[k]["wall_s"]["median"] for k in ("anomark", "peer", "polars-read"))
        am, pm, rm = (s[k]["rss_mib"]["median"] for k in ("anomark", "peer", "polars-read"))
        pin, rin = s["peer"]["in_process_s"]["median"], s["polars-read"]["in_process_s"]["median"]
        a0 = s["anomark-noci"]["wall_s"]["median"]
        rows.append(["{:,}".format(d["n"]), fmt_ratio(ratio(aw, a0)), fmt_ratio(ratio(pw, aw)),
                     fmt_ratio(ratio(pin, aw)), fmt_ratio(ratio(pm, am)),
                     fmt_ratio(ratio(aw, rw)), fmt_ratio(ratio(aw, rin)), fmt_ratio(ratio(am, rm))])
    parts.append(table(["N", "anomark default/no-intervals wall", "peer/anomark wall",
                        "peer in-process/anomark wall", "peer/anomark RSS",
                        "anomark/bare-read wall", "anomark wall/bare read_csv in-process",
                        "anomark/bare-read RSS"], rows))
    parts += ["", "anomark here is the default run (with intervals).", ""]
    parts.append("")

    parts += ["## anomark time per row", ""]
    rows = []
    base = None
    for d in sorted(docs, key=lambda d: d["rows"]):
        aw = d["summary"]["anomark"]["wall_s"]["median"]
        per_row = aw / d["rows"] * 1e6
        base = base if base is not None else per_row
        rows.append(["{:,}".format(d["n"]), "{:,}".format(d["rows"]), fmt(aw), fmt(per_row, 3), fmt(per_row / base, 2)])
    parts.append(table(["N", "rows", "anomark wall s (median)", "µs per row", "per-row time vs smallest N"], rows))
    parts.append("")

    parts += ["## Agreement: multivariate-gaussian test confusion (tp fp fn tn)", ""]
    rows = []
    for d in docs:
        a = d["agreement"]
        am = a["anomark_mvn_test"]
        pm = a["peer_mvn_test"]
        cm = lambda c: "n/a" if c is None else "%d %d %d %d" % (c["tp"], c["fp"], c["fn"], c["tn"])
        verdict = "equal" if a["equal"] else "**DIFFERENT**"
        vf = (a["anomark_mvn_validation_f1"], a["peer_mvn_validation_f1"])
        if not a["equal"] and None not in vf and abs(vf[0] - vf[1]) <= 1e-12:
            verdict += " (same validation max F1: the test rows between the two ln ε differ)"
        if d["n"] == 1000000:
            quoted = {"tp": 2481, "fp": 6, "fn": 19, "tn": 199994}
            verdict += "; peer README quote %s" % ("matches" if pm == quoted else "**differs**")
        rows.append(["{:,}".format(d["n"]), a["anomark_chosen"] or "n/a",
                     "yes" if a["anomark_mvn_is_chosen"] else "no", cm(am), cm(pm),
                     "%s / %s" % (fmt(vf[0], 6), fmt(vf[1], 6)),
                     "%r / %r" % (a["anomark_mvn_ln_epsilon"], a["peer_mvn_log_eps"]), verdict,
                     "yes" if a["stable_across_repeats"] else "**no**"])
    parts.append(table(["N", "anomark chosen", "mvn chosen", "anomark mvn test", "peer mvn test",
                        "validation F1 anomark / peer", "ln ε anomark / peer", "verdict",
                        "same in every repeat"], rows))
    parts += ["", "anomark puts τ midway between the lowest flagged validation score and the next "
              "lower one; the peer puts ln ε just above the highest ln p among the flagged rows. Both flag "
              "the same validation rows; a test row whose score falls between the two can be decided "
              "differently.", ""]
    parts.append("Raw records: %s" % ", ".join("bench/results/bench_%d.json" % d["n"] for d in docs))
    return "\n".join(parts)


if __name__ == "__main__":
    main()
