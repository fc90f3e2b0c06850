"""Adversarial validity: false-alarm rates of true-null experiments
through the real `stopcock replay`, on streams written outside the
project's own generator (tests/ref/_adversary.py; issue 10).

Each cell is one condition x one guardrail. Its stream holds `runs` null
experiments (no real harm: equal arms, a better treatment, or an effect
exactly at the margin) and max(12, runs / 16) positive ones with a clear
planted harm.
The cell's false-alarm rate is the share of null experiments with any
harm verdict line on its guardrail (any SRM line, for the SRM cells); it
must stay at or under level + 3 sqrt(level (1 - level) / runs), the
Monte Carlo bound of a test whose rate is the level (Ville's inequality,
Ville 1939, bounds the rate of an anytime-valid test by its level however
often it is looked at). A second test per cell asks that the positive runs are
found (at least half of them), so a cell whose test never looks at its
data, or whose records are refused, cannot pass by silence. Any record
the replay refuses fails the cell, unless the condition expects it
(closed_epoch: a late record naming a closed epoch).

The per-test level is the alpha of the cell's configuration divided by
its Bonferroni family, guardrails x treatment arms (src/core/engine.c
exp_settings); every stream has one treatment arm, so alpha = level x
guardrails.

Power (reported, never pass/fail here; on with --json or --power): 50/50,
plan_units 10000, level 0.0125, the planted effect of the one-look,
one-sided fixed-horizon test with 80% power at n = 10000 per arm (z
quantiles from scipy.stats.norm). Reported: median units to harm over
the fixed-horizon 2n, beside a Wald SPRT at the true effect (a lower
bound, computed in numpy on the same data).

Cost: the default (200 null runs per cell) is about 270 CPU seconds,
half of it replay; measured 216 s on this 2-core machine while others
loaded it (load average 3). --full (1000 runs, plus power) is about five
times that. Streams run two at a time (--jobs), each its own generator
process piped into its own replay.

  test_adversary.py [--runs N] [--full] [--json FILE] [--only SUBSTR]
                    [--attrs auto|on|off] [--power] [--power-runs N]
                    [--jobs J]
"""
import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _adversary as A  # noqa: E402

BUILD = os.environ.get("STOPCOCK_BUILD", "build")
OUT = os.environ.get("STOPCOCK_TEST_OUT", os.path.join(BUILD, "test-output"))
STOPCOCK = os.path.join(BUILD, "stopcock")
SEED = 20261202


def guard(name, metric, test, harm="increase", margin="0", extra=""):
    return ("[guardrail %s]\nmetric = %s\ntest = %s\nharm = %s\n"
            "margin = %s\n%s\n" % (name, metric, test, harm, margin, extra))


Q99 = "quantile = 0.99\n"
Q50 = "quantile = 0.5\n"

# A stream: one generator, one configuration, one replay, one or more
# cells (guardrail name -> cell name). level is every cell's per-test
# level. alpha is set to level x guardrails. cost: CPU ms per run measured
# on this machine (generator + replay), for
# scheduling only.
STREAMS = [
    dict(id="01a", gen=A.g_split_prop, cost=63, level=0.01, plan=1500,
         params=dict(share=0.05, n=25000, p=0.02, p_pos=0.002, rate=50,
                     metric=b"conv"),
         guards=[guard("conv", "conv", "proportion", "decrease")],
         cells={"conv": "01a proportion 95/5, 2% conversion, "
                        "harm = decrease"}),
    dict(id="01b", gen=A.g_split_prop, cost=105, level=0.01, plan=600,
         params=dict(share=0.01, n=50000, p=0.02, p_pos=0.0, rate=80,
                     metric=b"conv"), pos_params=dict(n=150000),
         guards=[guard("conv", "conv", "proportion", "decrease")],
         cells={"conv": "01b proportion 99/1, 2% conversion, "
                        "harm = decrease"}),
    dict(id="02a", gen=A.g_split_prop, cost=56, level=0.01, plan=1500,
         params=dict(share=0.95, n=25000, p=0.01, p_pos=0.03, rate=100,
                     metric=b"err"),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "02a proportion 5/95, 1% errors per request, "
                       "harm = increase"}),
    dict(id="02b", gen=A.g_split_prop, cost=84, level=0.01, plan=600,
         params=dict(share=0.99, n=50000, p=0.01, p_pos=0.06, rate=100,
                     metric=b"err"), pos_params=dict(n=120000),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "02b proportion 1/99, 1% errors per request, "
                       "harm = increase"}),
    dict(id="03", gen=A.g_ramp_better, cost=85, level=0.0125, plan=5000,
         params=dict(sizes=(5000, 5000), rate=20, better=0.97),
         guards=[guard("lat_mean", "lat", "mean"),
                 guard("lat_p99", "lat", "quantile", extra=Q99),
                 guard("err", "err", "proportion"),
                 guard("crash", "crash", "rate")],
         cells={"lat_mean": "03 ramp 10/90 -> 50/50, treatment better: "
                            "latency mean",
                "lat_p99": "03 ramp 10/90 -> 50/50, treatment better: "
                           "latency p99",
                "err": "03 ramp 10/90 -> 50/50, treatment better: "
                       "error proportion",
                "crash": "03 ramp 10/90 -> 50/50, treatment better: "
                         "crash rate"}),
    dict(id="04", gen=A.g_ramp3_err, cost=54, level=0.0125, plan=5000,
         params=dict(sizes=(10000, 7500, 7500), rate=10, drift=False),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "04 ramp 1/99 -> 10/90 -> 50/50, no drift: "
                       "error proportion"}),
    dict(id="05", gen=A.g_ramp3_err, cost=46, level=0.0125, plan=5000,
         params=dict(sizes=(10000, 7500, 7500), rate=10, drift=True),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "05 ramp 1/99 -> 10/90 -> 50/50, baseline drift: "
                       "error proportion"}),
    dict(id="06", gen=A.g_ramp3_late, cost=40, level=0.0125, plan=5000,
         late_ok=True,
         params=dict(sizes=(7500, 7500, 10000), rate=10, lag=300),
         guards=[guard("lat_mean", "lat", "mean")],
         cells={"lat_mean": "06 ramp + drift, records ~5 min after "
                            "exposure: latency mean"}),
    dict(id="07", gen=A.g_srm_batched, cost=32, level=0.001, plan=15000,
         params=dict(n=30000, dur=60, lo=0.5, hi=1.5), guards=[],
         cells={"srm": "07 SRM, per-arm batches of ~250 a second"}),
    dict(id="08", gen=A.g_clustered, cost=180, level=0.01, plan=5000,
         params=dict(nusers=1000, dur=600, user_sd=0.65, req_sd=0.3,
                     beta=(0.02, 1.98)),
         guards=[guard("lat_mean", "lat", "mean"),
                 guard("lat_p99", "lat", "quantile", extra=Q99),
                 guard("err", "err", "proportion")],
         cells={"lat_mean": "08 requests clustered in users (deff ~9): "
                            "latency mean",
                "lat_p99": "09 requests clustered in users: latency p99",
                "err": "10a errors sent per request, clustered in users"}),
    dict(id="10b", gen=A.g_sessions, cost=70, level=0.01, plan=5000,
         params=dict(nusers=1500, dur=600, beta=(0.05, 4.95)),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "10b errors sent per session, ~5 sessions a user"}),
    dict(id="11a", gen=A.g_crash_sessions, cost=39, level=0.05, plan=10000,
         params=dict(n=20000, dur=500, shape=0.05),
         guards=[guard("crash", "crash", "rate")],
         cells={"crash": "11a crash rate, overdispersed sessions "
                         "(negative binomial)"}),
    dict(id="11b", gen=A.g_crash_devices, cost=47, level=0.05, plan=10000,
         params=dict(ndev=4000, dur=500, shape=0.1),
         guards=[guard("crash", "crash", "rate")],
         cells={"crash": "11b crash rate, devices with ~5 sessions each"}),
    dict(id="12", gen=A.g_p50_grid, cost=40, level=0.05 / 3, plan=10000,
         params=dict(n=20000, dur=500, shift=10, shift_pos=40),
         guards=[guard("lat_p50", "lat", "quantile", margin="10",
                       extra=Q50)],
         cells={"lat_p50": "12 p50 on a 10 ms grid, effect = the 10 ms "
                           "margin"}),
    # further attacks
    dict(id="x1", gen=A.g_split_prop, cost=46, level=0.01, plan=600,
         params=dict(share=0.02, n=25000, p=0.01, p_pos=0.06, rate=100,
                     metric=b"err"),
         guards=[guard("err", "err", "proportion")],
         cells={"err": "x1 proportion 98/2, small treatment, 1% errors, "
                       "harm = increase (skewed small arm)"}),
    dict(id="x2", gen=A.g_split_mean, cost=44, level=0.01, plan=600,
         params=dict(share=0.02, n=25000, median=30, sigma=1.5,
                     factor_pos=0.5, rate=100),
         guards=[guard("basket", "basket", "mean", "decrease")],
         cells={"basket": "x2 mean of lognormal(1.5) values, 98/2 small "
                          "treatment, harm = decrease"}),
    dict(id="x3", gen=A.g_split_mean, cost=43, level=0.01, plan=600,
         params=dict(share=0.98, n=25000, median=30, sigma=1.5,
                     factor_pos=3.0, rate=100),
         guards=[guard("basket", "basket", "mean")],
         cells={"basket": "x3 mean of lognormal(1.5) values, 2/98 small "
                          "control, harm = increase"}),
    dict(id="x4", gen=A.g_short_epochs, cost=28, level=0.01, plan=5000,
         params=dict(epochs=12, size=1500, rate=10),
         guards=[guard("lat_mean", "lat", "mean")],
         cells={"lat_mean": "x4 12 short epochs (50/50 <-> 40/60), "
                            "lognormal(1) latency mean"}),
    dict(id="x5", gen=A.g_srm_producers, cost=44, level=0.001, plan=15000,
         params=dict(n=30000, dur=60, hosts=4, lo=0.2, hi=8, lag=15),
         guards=[],
         cells={"srm": "x5 SRM, 4 producers per arm out of order, "
                       "treatment hosts 15 s behind"}),
    dict(id="x6", gen=A.g_srm_ramp, cost=42, level=0.001, plan=15000,
         params=dict(rate=400, dur=40, lo=0.5, hi=1.5, plan_late=5),
         guards=[],
         cells={"srm": "x6 SRM across a ramp step, plan record 5 s late, "
                       "per-arm batches"}),
    dict(id="x9", gen=A.g_srm_counters, cost=6, level=0.001, plan=15000,
         params=dict(rate=50, dur=600, every=5, late=25), guards=[],
         cells={"srm": "x9 SRM, exposures pre-counted over the same 5 s "
                       "for every arm, each arm's counts up to 25 s late"}),
    dict(id="x10", gen=A.g_split_rate, cost=50, level=0.01, plan=400,
         params=dict(share=0.01, n=25000, lam=0.05, factor_pos=0.0,
                     rate=50), pos_params=dict(n=150000, lam=0.1),
         guards=[guard("crash", "crash", "rate", "decrease")],
         cells={"crash": "x10 rare crashes (0.05/h), 99/1 small treatment "
                         "without events, harm = decrease"}),
    dict(id="x11", gen=A.g_split_rate, cost=50, level=0.01, plan=400,
         params=dict(share=0.99, n=25000, lam=0.05, factor_pos=4.0,
                     rate=50), pos_params=dict(n=80000),
         guards=[guard("crash", "crash", "rate")],
         cells={"crash": "x11 rare crashes (0.05/h), 1/99 small control "
                         "without events, harm = increase"}),
    # Metric records are applied up to an event-time watermark common to
    # the arms, so one arm's lagging delivery during a drift compares
    # like with like (was the open gap of round 2: mean 1.00, p50 0.47).
    dict(id="x12", gen=A.g_lagged_arm, cost=40, level=0.01, plan=10000,
         params=dict(n=20000, dur=400, lag=25),
         guards=[guard("lat_mean", "lat", "mean"),
                 guard("lat_p50", "lat", "quantile", extra=Q50)],
         cells={"lat_mean": "x12 cold start (latency falling), treatment "
                            "records delivered 25 s late: latency mean",
                "lat_p50": "x12 cold start (latency falling), treatment "
                           "records delivered 25 s late: latency p50"}),
    dict(id="x7", gen=A.g_clustered, cost=80, level=0.01, plan=5000,
         params=dict(nusers=1000, dur=600, user_sd=0.65, req_sd=0.3,
                     beta=(0.02, 1.98), reqs=A.reqs_whale, errors=False),
         guards=[guard("lat_mean", "lat", "mean")],
         cells={"lat_mean": "x7 whale users (Pareto 1.3 requests per "
                            "user): latency mean"}),
    dict(id="x8", gen=A.g_margin_edge, cost=90, level=0.01, plan=4000,
         params=dict(n=8000, rate=20),
         guards=[guard("e_mean", "e_mean", "mean", margin="3%"),
                 guard("e_p99", "e_p99", "quantile", margin="5%",
                       extra=Q99),
                 guard("e_err", "e_err", "proportion", margin="10%"),
                 guard("e_crash", "e_crash", "rate", margin="10%")],
         cells={"e_mean": "x8 effect exactly at a 3% margin: mean",
                "e_p99": "x8 effect exactly at a 5% margin: p99",
                "e_err": "x8 effect exactly at a 10% margin: proportion",
                "e_crash": "x8 effect exactly at a 10% margin: rate"}),
]

POWER = dict(id="power", gen=A.g_power, cost=300, level=A.POWER_LEVEL,
             plan=A.POWER_N,
             guards=[guard("pw_mean", "pw_mean", "mean"),
                     guard("pw_prop", "pw_prop", "proportion"),
                     guard("pw_rate", "pw_rate", "rate"),
                     guard("pw_q", "pw_q", "quantile", extra=Q99)],
             kinds={"pw_mean": "mean", "pw_prop": "proportion",
                    "pw_rate": "rate", "pw_q": "quantile"})


def conf_text(spec):
    g = max(1, len(spec["guards"]))
    srm = spec["level"] if "srm" in spec.get("cells", {}) else 0.001
    return ("[defaults]\nalpha = %.10g\nsrm_alpha = %.10g\nplan_units = %d\n"
            "max_experiments = 100000\nmax_metrics = 24\n\n%s"
            % (spec["level"] * g, srm, spec["plan"],
               "".join(spec["guards"])))


def replay_stream(spec, runs, pos_runs, attrs, tmp, params=None):
    """Generate one stream into a replay's stdin; return its harm and SRM
    lines per experiment, the refused records and the seconds taken."""
    conf = os.path.join(tmp, "%s.conf" % spec["id"])
    with open(conf, "w") as f:
        f.write(conf_text(spec))
    out = open(os.path.join(tmp, "%s.out" % spec["id"]), "w+")
    err = open(os.path.join(tmp, "%s.err" % spec["id"]), "w+")
    t = time.time()
    cpu = time.process_time()
    p = subprocess.Popen([STOPCOCK, "replay", "-q", "-c", conf, "-"],
                         stdin=subprocess.PIPE, stdout=out, stderr=err)
    info = {}
    try:
        info = A.runs_stream(spec["gen"], params or spec["params"], runs,
                             pos_runs, SEED + sum(map(ord, spec["id"])),
                             attrs, p.stdin.write,
                             pos_params=spec.get("pos_params"))
    except BrokenPipeError:	# replay died: its exit status says why
        pass
    finally:
        try:
            p.stdin.close()
        except BrokenPipeError:
            pass
    gen_cpu = time.process_time() - cpu
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = rc = os.waitstatus_to_exitcode(status)
    secs = time.time() - t
    out.seek(0)
    err.seek(0)
    harm, srm = {}, set()
    for line in out:
        v = json.loads(line)
        if v.get("kind") == "srm":
            srm.add(v["experiment"])
        elif v.get("kind") == "verdict" and v.get("verdict") == "harm":
            harm.setdefault((v["experiment"], v["guardrail"]), v)
    errtext = err.read()
    refused = {}
    for line in errtext.splitlines():
        w = line.split()
        if len(w) == 4 and w[1] == "rejected" and w[2].endswith(":"):
            refused[w[2][:-1]] = int(w[3])
    out.close()
    err.close()
    return dict(harm=harm, srm=srm, refused=refused, rc=rc, secs=secs,
                cpu=dict(generator=round(gen_cpu, 1), replay=round(
                    ru.ru_utime + ru.ru_stime, 1)),
                info=info, stderr=errtext[-2000:])


def se0(level, runs):
    return math.sqrt(level * (1 - level) / runs)


def run_cells(spec, runs, pos_runs, attrs, tmp):
    r = replay_stream(spec, runs, pos_runs, attrs, tmp)
    refused = dict(r["refused"])
    if spec.get("late_ok") and attrs:
        refused.pop("closed_epoch", None)
    cells = []
    for g, name in spec["cells"].items():
        if g == "srm":
            hit = r["srm"]
        else:
            hit = {e for (e, gg) in r["harm"] if gg == g}
        null = sum(1 for e in hit if e.startswith("n"))
        pos = sum(1 for e in hit if e.startswith("p"))
        level = spec["level"]
        bound = level + 3 * se0(level, runs)
        cells.append(dict(
            cell=name, stream=spec["id"], guardrail=g, level=level,
            runs=runs, false_alarms=null, rate=null / runs,
            se=se0(level, runs), bound=bound,
            ok=null / runs <= bound and r["rc"] == 0 and not refused,
            positive_runs=pos_runs, positive_found=pos,
            live=pos >= pos_runs / 2, refused=r["refused"],
            unexpected_refused=refused, rc=r["rc"],
            seconds=round(r["secs"], 1), cpu_seconds=r["cpu"], attrs=attrs,
            stderr=r["stderr"] if r["rc"] != 0 else ""))
    return cells


def run_power(runs, attrs, tmp):
    eff = A.power_effects()
    horizon = 3 * 2 * A.POWER_N
    spec = dict(POWER)
    spec["cells"] = {}
    r = replay_stream(spec, runs, 0, attrs, tmp,
                      params=dict(eff=eff, horizon=horizon))
    res = []
    for g, kind in POWER["kinds"].items():
        units, sprt = [], []
        for e, inf in r["info"].items():
            v = r["harm"].get((e, g))
            units.append(sum(a["n"] for a in v["arms"]) if v else math.inf)
            sprt.append(inf[1][kind])
        units.sort()
        sprt.sort()
        med = units[len(units) // 2] if units else math.inf
        smed = sprt[len(sprt) // 2] if sprt else math.inf
        fixed = 2 * A.POWER_N
        e = eff[kind]
        res.append(dict(
            kind=kind, runs=len(units), level=A.POWER_LEVEL,
            plan_units=A.POWER_N, horizon_units=horizon,
            effect=e.get("delta", e.get("rel")),
            effect_scale="relative" if kind == "quantile" else "absolute",
            fixed_horizon_units=fixed,
            detected=sum(1 for u in units if u < math.inf) / max(1,
                                                                 len(units)),
            median_units=med, ratio=med / fixed,
            sprt_median_units=smed, sprt_ratio=smed / fixed,
            seconds=round(r["secs"], 1), cpu_seconds=r["cpu"],
            refused=r["refused"]))
    return res


def probe_attrs(tmp):
    """1 when this build's replay accepts unit= and epoch=."""
    conf = os.path.join(tmp, "probe.conf")
    with open(conf, "w") as f:
        f.write("[defaults]\nalpha = 0.05\n")
    lines = ("@100 plan e ctl=50 trt=50\n@101 expose e ctl unit=u1\n"
             "@102 observe e ctl m 1.5 unit=u1 epoch=1\n"
             "@103 count e trt c 0 1 unit=u2 epoch=1\n")
    p = subprocess.run([STOPCOCK, "replay", "-q", "-c", conf, "-"],
                       input=lines.encode(), capture_output=True)
    return p.returncode == 0 and b" 0 rejected" in p.stderr


def version():
    """The version of the build (release + commit), as the daemon beside
    the CLI carries it; the CLI itself does not."""
    import re
    try:
        with open(os.path.join(BUILD, "stopcockd"), "rb") as f:
            m = re.search(rb"\b\d+\.\d+\.\d+\+[0-9a-f]{7,}\b", f.read())
        return m.group(0).decode() if m else "unknown"
    except OSError:
        return "missing"


def fmt(x):
    return "inf" if x == math.inf else "%.4g" % x


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--runs", type=int, default=None,
                    help="null runs per cell (default 200; --full 1000)")
    ap.add_argument("--full", action="store_true",
                    help=">= 1000 runs per cell, and power (make bench)")
    ap.add_argument("--json", metavar="FILE", help="write every cell here")
    ap.add_argument("--only", action="append", default=[],
                    help="streams whose id or cell name has this")
    ap.add_argument("--attrs", choices=("auto", "on", "off"), default="auto",
                    help="emit unit= and epoch= (auto: if replay takes "
                         "them)")
    ap.add_argument("--power", action="store_true", help="run power cells")
    ap.add_argument("--power-runs", type=int, default=200)
    ap.add_argument("--jobs", type=int, default=2)
    a = ap.parse_args()
    runs = a.runs or (1000 if a.full else 200)
    if a.full:
        runs = max(runs, 1000)
    pos_runs = max(12, runs // 16)
    os.makedirs(OUT, exist_ok=True)
    tmp = tempfile.mkdtemp(prefix="adversary-", dir=OUT)
    attrs = a.attrs == "on" or (a.attrs == "auto" and probe_attrs(tmp))
    streams = [s for s in STREAMS if not a.only or any(
        o in s["id"] or any(o in c for c in s["cells"].values())
        for o in a.only)]
    power = a.power or a.full or (a.json is not None and not a.only)
    ncells = sum(len(s["cells"]) for s in streams)
    spec_of = {c: s for s in streams for c in s["cells"].values()}
    print("1..%d" % (2 * ncells))
    print("# %s replay (%s), %d null + %d positive runs per cell, "
          "unit=/epoch= %s" % (STOPCOCK, version(), runs, pos_runs,
                               "on" if attrs else
                               "off (this build refuses them)"))
    sys.stdout.flush()
    t0 = time.time()
    n = 0
    failed = 0
    results = []
    order = sorted(streams, key=lambda s: -s["cost"])
    with ProcessPoolExecutor(max_workers=a.jobs) as ex:
        futs = {ex.submit(run_cells, s, runs, pos_runs, attrs, tmp): s
                for s in order}
        pfut = ex.submit(run_power, a.power_runs, attrs, tmp) \
            if power else None
        for fu in as_completed(futs):
            try:
                cells = fu.result()
            except Exception as e:	# a broken stream fails its cells
                cells = [dict(cell=name, ok=False, live=False, error=repr(e),
                              stream=futs[fu]["id"])
                         for name in futs[fu]["cells"].values()]
            for c in cells:
                if "error" in c:
                    results.append(c)
                    for what in ("", ": live"):
                        n += 1
                        print("not ok %d %s%s # generator or replay failed: "
                              "%s" % (n, c["cell"], what, c["error"]))
                    failed += 2
                    continue
                results.append(c)
                n += 1
                detail = ("rate=%.4f level=%g se=%.4f bound=%.4f runs=%d "
                          "alarms=%d seconds=%.1f"
                          % (c["rate"], c["level"], c["se"], c["bound"],
                             c["runs"], c["false_alarms"], c["seconds"]))
                if c["unexpected_refused"]:
                    detail += " refused=%s" % json.dumps(
                        c["unexpected_refused"], sort_keys=True)
                elif c["refused"]:
                    detail += " refused(expected)=%s" % json.dumps(
                        c["refused"], sort_keys=True)
                if c["rc"] != 0:
                    detail += " replay exit %d" % c["rc"]
                gap = spec_of.get(c["cell"], {}).get("gap")
                if gap and not c["ok"]:
                    print("ok %d %s # SKIP known gap, %s: %s" % (
                        n, c["cell"], gap, detail))
                else:
                    print("%s %d %s # %s" % ("ok" if c["ok"] else "not ok",
                                             n, c["cell"], detail))
                    failed += not c["ok"]
                n += 1
                print("%s %d %s: live, planted harm found in %d of %d runs"
                      % ("ok" if c["live"] else "not ok", n, c["cell"],
                         c["positive_found"], c["positive_runs"]))
                failed += not c["live"]
                if c["stderr"]:
                    for ln in c["stderr"].splitlines()[-5:]:
                        print("#   " + ln)
                sys.stdout.flush()
        try:
            pres = pfut.result() if pfut else []
        except Exception as e:
            print("# power run failed: %r" % e)
            pres = []
    for p in pres:
        print("# power %-10s effect %s: detected %.3f, median units to harm "
              "%s over fixed-horizon %d = %s; Wald SPRT %s (%s)"
              % (p["kind"], fmt(p["effect"]), p["detected"],
                 fmt(p["median_units"]), p["fixed_horizon_units"],
                 fmt(p["ratio"]), fmt(p["sprt_median_units"]),
                 fmt(p["sprt_ratio"])))
    total = time.time() - t0
    print("# %d cells, %d failed, %.0f s" % (ncells, failed, total))
    if a.json:
        def finite(x):
            if isinstance(x, float) and not math.isfinite(x):
                return None
            if isinstance(x, dict):
                return {k: finite(v) for k, v in x.items()}
            if isinstance(x, list):
                return [finite(v) for v in x]
            return x
        results = finite(results)
        pres = finite(pres)
        results.sort(key=lambda c: c["cell"])
        with open(a.json, "w") as f:
            json.dump(dict(build=STOPCOCK, version=version(), attrs=attrs,
                           seed=SEED, runs=runs,
                           positive_runs=pos_runs, seconds=round(total, 1),
                           cells=results, power=pres), f, indent=1,
                      default=lambda x: None)
            f.write("\n")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
