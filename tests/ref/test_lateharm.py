"""Harm that starts late, through the real `stopcock replay`.

Streams come from tests/ref/_lateharm.py (numpy, nothing from stopcock):
per guardrail kind, runs of H healthy units (100 a second of record time,
50/50) and then a harmful treatment (proportion: errors 1% -> 2%; rate:
crashes double; mean: +0.3 sd; quantile: p99 +20%), each run its own
experiment id. Every stream is replayed twice, with margin 0 and with a
10% margin (with which "safe" is usually declared in the healthy phase).

Per cell (kind, H, margin), from the replay's JSON verdict lines:
  raised     share of runs with a harm line within 200k units after the
             change, of the runs not already in harm at the change (a
             harm is final in an epoch; those runs are the false alarms)
  delay      median and 90th percentile of the units after the change
             until the harm line, over the same runs (runs that never
             raise harm count as infinite)
  false      harm lines with record time before the change
  safe       runs with a safe verdict before the change
beside two references computed with numpy on the same data: the oracle
(a one-sided normal-mixture test started at the change, at the
guardrail's level) and Page's CUSUM at the true excess with the engine's
threshold log c (read from the harm lines' "detector"; a kind without a
detector takes the one another kind's stream reports, as all streams
have one guardrail under the same defaults; with no detector at all,
log(20 * 30 * 86400 / 0.05), the issue's budget: 20 series looked at
every second for 30 days, 0.05 expected false alarms).

Assertions (fast mode, H = 20k and 200k):
  - a doubling (proportion errors, rate crashes) is raised within 200k
    units in >= 95% of runs, with either margin, whatever the verdict
    before the change;
  - mean, proportion and rate (the kinds with a change detector): the
    median delay after 200k healthy units is within 1.2x of that after
    20k (the harmful data are the same: common random numbers);
  - false alarms before the change in at most level + 3 standard errors
    of runs, level = the guardrail's alpha plus the detector's bound
    T / c over the T healthy blocks (Shin, Ramdas & Rinaldo 2023: an
    e-detector at threshold c alarms by block T with probability <= T/c);
  - every line of every stream is applied by the engine.
The other targets (every kind's median delay within 1.5x of the CUSUM's;
flat after 1M healthy units and for quantiles) are reported in --json
and as comments. With --full (make bench: H = 20k, 200k and 1M) they are
TAP lines too, and the exit status is 0 whatever they say: the bench
reports its figures rather than stopping on them.

  test_lateharm.py [--runs N] [--full] [--json FILE] [--seed S]
                   [--kinds proportion,rate,mean,quantile]
Binaries from $STOPCOCK_BUILD (default build).
"""
import argparse
import json
import math
import os
import resource
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _lateharm as L  # noqa: E402

BUILD = os.environ.get("STOPCOCK_BUILD", "build")
STOPCOCK = os.path.join(BUILD, "stopcock")
MARGINS = (0.0, 0.1)
DETECTOR_KINDS = ("mean", "proportion", "rate")
DOUBLING_KINDS = ("proportion", "rate")

n_tests = 0
failed = 0


def ok(cond, name, detail=None):
    global n_tests, failed
    n_tests += 1
    print("%s %d %s" % ("ok" if cond else "not ok", n_tests, name))
    if not cond:
        failed += 1
        if detail:
            for line in str(detail).splitlines():
                print("# " + line)
    sys.stdout.flush()


def comment(text):
    for line in text.splitlines():
        print("# " + line)
    sys.stdout.flush()


def pct(x, q):
    """Percentile of delays with never = inf (None when infinite)."""
    v = float(np.percentile(x, q, method="higher")) if len(x) else math.inf
    return v if math.isfinite(v) else None


def summarise(r):
    d, runs = r["delay"], r["runs"]
    raised = np.isfinite(d)
    # a run already in harm at the change (a false alarm) cannot raise it
    # again in the epoch: it is counted with the false alarms, not here
    clean = ~r["false_alarm"]
    med, p90 = pct(d[clean], 50), pct(d[clean], 90)
    cmed = pct(r["cusum"], 50)
    blocks = r["healthy"] / L.BLOCK
    level = r["level"] + blocks / math.exp(r["log_c"])
    se = math.sqrt(level * (1 - level) / runs)
    return {
        "kind": r["kind"], "healthy": r["healthy"], "margin": r["margin"],
        "runs": runs,
        "raised_within_200k": float(raised[clean].sum() /
                                    max(1, clean.sum())),
        "delay_median": med, "delay_p90": p90,
        "false_alarms_before_change": int(r["false_alarm"].sum()),
        "false_alarm_share": float(r["false_alarm"].mean()),
        "false_alarms_by_detector": int((r["false_alarm"] &
                                         r["by_detector"]).sum()),
        "false_alarm_bound": level + 3 * se,
        "safe_before_change": float(r["safe_before"].mean()),
        # of the runs judged safe before the change (None: no such run)
        "raised_after_safe": float((raised & r["safe_before"]).sum() /
                                   r["safe_before"].sum())
        if r["safe_before"].any() else None,
        "raised_by_detector": float((raised & r["by_detector"]).sum() /
                                    max(1, raised.sum())),
        "oracle_median": pct(r["oracle"], 50),
        "oracle_p90": pct(r["oracle"], 90),
        "cusum_median": cmed, "cusum_p90": pct(r["cusum"], 90),
        "cusum_false_alarms": int(r["cusum_false_alarm"].sum()),
        "vs_cusum": (med / cmed) if med is not None and cmed else None,
        "log_c": r["log_c"], "log_c_from": r["log_c_from"],
        "level": r["level"],
        "records_sent": r["sent"], "records_applied": r["applied"],
        "rejected": r["rejected"], "replay_rc": r["replay_rc"],
    }


def fmt(v):
    if v is None:
        return "never"
    if isinstance(v, float) and v != int(v):
        return "%.2f" % v
    return "%d" % v


def table(cells):
    head = ("kind", "H", "margin", "raised", "median", "p90", "oracle",
            "cusum", "x cusum", "false", "safe before")
    rows = []
    for c in cells:
        rows.append((c["kind"], "%d" % c["healthy"], "%g%%" % (100 *
                     c["margin"]), "%.2f" % c["raised_within_200k"],
                     fmt(c["delay_median"]), fmt(c["delay_p90"]),
                     fmt(c["oracle_median"]), fmt(c["cusum_median"]),
                     "%.2f" % c["vs_cusum"] if c["vs_cusum"] else "-",
                     "%d/%d" % (c["false_alarms_before_change"], c["runs"]),
                     "%.2f" % c["safe_before_change"]))
    w = [max(len(h), *(len(r[i]) for r in rows)) for i, h in
         enumerate(head)]
    out = ["  ".join(h.rjust(w[i]) for i, h in enumerate(head))]
    for r in rows:
        out.append("  ".join(x.rjust(w[i]) for i, x in enumerate(r)))
    return "\n".join(out)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--runs", type=int, default=None,
                    help="runs per cell (default 30; --full 40)")
    ap.add_argument("--full", action="store_true",
                    help="H = 20k, 200k and 1M healthy units")
    ap.add_argument("--json", help="write every cell's figures here")
    ap.add_argument("--seed", type=int, default=16)
    ap.add_argument("--kinds", default=",".join(L.KINDS))
    a = ap.parse_args()
    runs = a.runs or (40 if a.full else 30)
    healthy = (20000, 200000, 1000000) if a.full else (20000, 200000)
    kinds = [k for k in a.kinds.split(",") if k]
    if not os.access(STOPCOCK, os.X_OK):
        ok(False, "%s is built" % STOPCOCK)
        print("1..%d" % n_tests)
        return 1
    comment("late harm: %d runs per cell, H = %s, kinds %s, seed %d, %s" %
            (runs, ",".join(str(h) for h in healthy), ",".join(kinds),
             a.seed, STOPCOCK))
    raws = []
    started = time.time()
    with tempfile.TemporaryDirectory(prefix="lateharm.") as tmp:
        for kind in kinds:
            for h in healthy:
                t = time.time()
                res = L.run_cell(STOPCOCK, kind, h, runs, a.seed, MARGINS,
                                 tmp)
                for r in res:
                    r["seconds"] = round(time.time() - t, 1)
                    raws.append(r)
                    ok(r["replay_rc"] == 0 and r["rejected"] == 0 and
                       r["applied"] == r["sent"],
                       "%s H=%d margin %g%%: replay applied all %d records"
                       % (kind, h, 100 * r["margin"], r["sent"]),
                       "rc %s, applied %s, rejected %s\n%s" % (
                           r["replay_rc"], r["applied"], r["rejected"],
                           "\n".join(r["replay_err"])))
                comment("%s H=%d: %.1f s" % (kind, h, time.time() - t))
    # every stream has one guardrail (family 1) under the same defaults,
    # so a kind without a detector takes the threshold the others report
    seen = sorted({r["log_c"] for r in raws if r["log_c_from"] == "replay"})
    if len(seen) == 1:
        for r in raws:
            if r["log_c_from"] != "replay":
                L.use_log_c(r, seen[0], "replay (another kind's detector, "
                            "same family)")
    cells = []
    for r in raws:
        c = summarise(r)
        c["seconds"] = r["seconds"]
        cells.append(c)
    comment("\n" + table(cells))
    by = {(c["kind"], c["healthy"], c["margin"]): c for c in cells}

    for c in cells:
        if c["kind"] in DOUBLING_KINDS:
            ok(c["raised_within_200k"] >= 0.95,
               "%s H=%d margin %g%%: harm raised within 200k units after "
               "the doubling in %.2f of runs not in harm before (>= 0.95; "
               "safe before in %.2f)" % (c["kind"], c["healthy"],
                                    100 * c["margin"],
                                    c["raised_within_200k"],
                                    c["safe_before_change"]))
    for c in cells:
        ok(c["false_alarm_share"] <= c["false_alarm_bound"],
           "%s H=%d margin %g%%: false alarms before the change in %d of "
           "%d runs (<= %.3f of runs: level + 3 s.e.)"
           % (c["kind"], c["healthy"], 100 * c["margin"],
              c["false_alarms_before_change"], c["runs"],
              c["false_alarm_bound"]))
    targets = []
    for kind in kinds:
        for m in MARGINS:
            base = by.get((kind, 20000, m))
            for h in healthy[1:]:
                c = by.get((kind, h, m))
                if base is None or c is None:
                    continue
                b, x = base["delay_median"], c["delay_median"]
                ratio = (x / b) if b and x is not None else None
                t = {"target": "flat", "kind": kind, "margin": m,
                     "healthy": h, "median": x, "median_20k": b,
                     "ratio": ratio, "bound": 1.2,
                     "met": ratio is not None and ratio <= 1.2}
                targets.append(t)
                if a.full or (kind in DETECTOR_KINDS and h == 200000):
                    t["asserted"] = True
                    ok(t["met"], "%s margin %g%%: median delay after %d "
                       "healthy units %s, after 20k %s (ratio %s <= 1.2)"
                       % (kind, 100 * m, h, fmt(x), fmt(b),
                          "%.2f" % ratio if ratio else "-"))
    for c in cells:
        t = {"target": "cusum", "kind": c["kind"],
             "healthy": c["healthy"], "margin": c["margin"],
             "ratio": c["vs_cusum"], "bound": 1.5,
             "met": c["vs_cusum"] is not None and c["vs_cusum"] <= 1.5}
        targets.append(t)
        if a.full:
            t["asserted"] = True
            ok(t["met"], "%s H=%d margin %g%%: median delay %s within 1.5x "
               "of the CUSUM's %s at log c = %.2f (ratio %s)"
               % (c["kind"], c["healthy"], 100 * c["margin"],
                  fmt(c["delay_median"]), fmt(c["cusum_median"]),
                  c["log_c"], "%.2f" % t["ratio"] if t["ratio"] else "-"))
    comment("targets not asserted here (see --json):")
    for t in targets:
        if not t.get("asserted"):
            comment("  %-5s %-10s H=%-7d margin %3g%%: ratio %s (<= %.1f) "
                    "%s" % (t["target"], t["kind"], t["healthy"],
                            100 * t["margin"],
                            "%.2f" % t["ratio"] if t["ratio"] else "never",
                            t["bound"], "met" if t["met"] else "NOT met"))
    elapsed = time.time() - started
    me = resource.getrusage(resource.RUSAGE_SELF)
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = {"generator": round(me.ru_utime + me.ru_stime, 1),
           "replays": round(ch.ru_utime + ch.ru_stime, 1)}
    comment("%.0f s in all; CPU: generator %.0f s, replays %.0f s"
            % (elapsed, cpu["generator"], cpu["replays"]))
    if a.json:
        with open(a.json, "w") as fp:
            json.dump({"runs": runs, "seed": a.seed, "full": a.full,
                       "stopcock": STOPCOCK, "seconds": round(elapsed, 1),
                       "cpu_seconds": cpu,
                       "scenario": {
                           "units_per_second": L.RATE,
                           "post_change_units": L.POST,
                           "proportion": [L.P_ERR, L.P_ERR_BAD],
                           "rate_per_hour": [L.CRASH, L.CRASH_BAD],
                           "mean_shift_sd": L.MEAN_SHIFT,
                           "quantile_scale": L.Q_SCALE},
                       "cells": cells, "targets": targets}, fp, indent=1)
            fp.write("\n")
    if a.full:
        comment("%d of %d checks not met (reported, exit status 0)"
                % (failed, n_tests))
    print("1..%d" % n_tests)
    return 1 if failed and not a.full else 0


if __name__ == "__main__":
    sys.exit(main())
