"""Validity, peeking inflation, power and coverage by simulation.

Every figure comes from `stopcock simulate --json`, which runs synthetic
experiments through the real engine (the daemon's and replay's code) and,
on the same streams, a naive analyst's z-test repeated at 5 looks.

Checks, each against a reference outside the engine:
  - A/A validity, >= 1000 null experiments per test kind (mean on normal
    and on heavy-tailed lognormal data, proportion, rate, quantile) and
    for SRM: the observed false-alarm rate is at most
    alpha + 3 Monte Carlo standard errors, SE = sqrt(alpha (1 - alpha) / R)
    (Ville's inequality: an anytime-valid test keeps its level however
    often it is looked at; docs/methods.md sec. 0).
  - Peeking: the naive two-sided z-test at nominal alpha = 0.05 repeated
    at 5 equally spaced looks on normal data rejects a true null about
    14.2% of the time (Armitage, McPherson & Rowe, "Repeated significance
    tests on accumulating data", JRSS-A 132:235-244, 1969; as tabulated
    in Wetterslev, Jakobsen & Gluud, BMC Med. Res. Methodol. 17:39, 2017,
    Table 1, and docs/methods.md sec. 8 / 10.8: 0.1418). The simulated rate
    must lie within 3 Monte Carlo SE of 0.142. For the other kinds the
    naive rate must clearly exceed the bound that the sequential test
    meets (the simulator sees the problem it guards against).
  - Coverage of the confidence sequences (truth 0 in A/A): at least
    1 - alpha within 3 Monte Carlo SE.
  - Power: with a known harmful effect the detection probability is high
    (>= 0.9 within a horizon of several fixed-horizon sample sizes); the
    median and 90th percentile of records-to-detection are printed next to
    the fixed-horizon size for 80% power. The fixed-horizon size itself is
    checked against scipy's normal quantiles (n = (z_{1-a} + z_{0.8})^2
    (s_a^2/w_a + s_b^2/w_b) / d^2, e.g. Chow, Shao & Wang 2008, sec. 3.2).
  - Results do not depend on -j (per-run seeds derive from the master seed).

Every run ticks the engine after every record, so each test is monitored
at every record the engine's own policy lets it look at (cheap kinds on
every record; quantile and rate evidence whenever their samples grew,
exactly as in the daemon and replay).
"""
import json
import math
import os
import subprocess
import sys
import tempfile

from scipy.stats import norm

BUILD = os.environ.get("STOPCOCK_BUILD", "build")
OUT = os.environ.get("STOPCOCK_TEST_OUT", os.path.join(BUILD, "test-output"))
STOPCOCK = os.path.join(BUILD, "stopcock")
ALPHA = 0.05
RUNS = 1000
ARMITAGE_5 = 0.142	# 5 looks at nominal 0.05 (Armitage et al. 1969)

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
    print("# " + text)
    sys.stdout.flush()


GUARDRAIL = {
    "mean": "metric = m\ntest = mean\n",
    "mean_heavy": "metric = m\ntest = mean\n",
    "proportion": "metric = e\ntest = proportion\n",
    "rate": "metric = c\ntest = rate\n",
    "quantile": "metric = l\ntest = quantile\nquantile = 0.95\n",
}
# Baselines: normal data for the mean (the Armitage setting), clustered
# errors (p = 0.05, 5 requests per unit, Beta concentration 20), crashes
# at 0.5 per hour over exponential session hours, lognormal latency.
BASELINE = {
    "mean": "m=normal:100:20",
    # heavy tails (lognormal, sigma 1.5): the plug-in variance's hard case
    "mean_heavy": "m=lognormal:100:1.5",
    "proportion": "e=binomial:0.05:5:20",
    "rate": "c=poisson:0.5:1",
    "quantile": "l=lognormal:180:0.5",
}
# A/A horizon (records; 2 per unit), records between ticks.
AA = {"mean": (8001, 1), "mean_heavy": (8001, 1), "proportion": (8001, 1), "rate": (8001, 1),
      "quantile": (8001, 1)}
# Harmful effects for the power runs, horizon 16001 records.
EFFECT = {"mean": ("m=+3", 1), "proportion": ("e=+60%", 1),
          "rate": ("c=+25%", 1), "quantile": ("l=+20%", 1)}

os.makedirs(OUT, exist_ok=True)
tmp = tempfile.mkdtemp(prefix="validity-", dir=OUT)


def conf_for(kind, plan_units):
    path = os.path.join(tmp, "%s-%d.conf" % (kind, plan_units))
    with open(path, "w") as f:
        f.write("[defaults]\nalpha = %g\nsrm_alpha = %g\nplan_units = %d\n\n"
                "[guardrail g_%s]\n%sharm = increase\nmargin = 0\n"
                % (ALPHA, ALPHA, plan_units, kind, GUARDRAIL[kind]))
    return path


def simulate(kind, runs, horizon, tick, extra=(), jobs=2):
    conf = conf_for(kind, (horizon - 1) // 4)
    args = [STOPCOCK, "simulate", "-c", conf, "--runs", str(runs),
            "--horizon", str(horizon), "--tick", str(tick), "-j", str(jobs),
            "--seed", "20260101", "--json", "--baseline", BASELINE[kind]]
    p = subprocess.run(args + list(extra), capture_output=True, timeout=900)
    if p.returncode != 0:
        raise RuntimeError("%s: %s" % (" ".join(args), p.stderr.decode()))
    return json.loads(p.stdout)


def se0(p, n):
    return math.sqrt(p * (1 - p) / n)


srm_false = srm_runs = srm_naive = 0
for kind in ("mean", "mean_heavy", "proportion", "rate", "quantile"):
    horizon, tick = AA[kind]
    d = simulate(kind, RUNS, horizon, tick)
    t = d["tests"][0]
    fa = t["false_alarm"]
    R = d["runs"]
    bound = ALPHA + 3 * se0(ALPHA, R)
    comment("%s A/A: %d runs of %d records, false alarms %.4f +- %.4f, "
            "naive at 5 looks %.4f, coverage %.4f"
            % (kind, R, horizon, fa["rate"], fa["se"] or 0,
               t["naive"]["rate"], t["coverage"]["rate"]))
    ok(R >= 1000 and fa["rate"] <= bound,
       "%s: A/A false-alarm rate %.4f <= alpha + 3 SE = %.4f"
       % (kind, fa["rate"], bound))
    cov = t["coverage"]
    cbound = 1 - ALPHA - 3 * se0(ALPHA, cov["runs"])
    ok(cov["rate"] >= cbound, "%s: CS coverage %.4f >= 1 - alpha - 3 SE "
       "= %.4f" % (kind, cov["rate"], cbound))
    naive = t["naive"]["rate"]
    if kind == "mean":
        tol = 3 * se0(ARMITAGE_5, R)
        ok(abs(naive - ARMITAGE_5) <= tol,
           "mean: naive z-test at 5 looks rejects %.4f of true nulls, "
           "within 3 SE (%.4f) of Armitage et al.'s 0.142" %
           (naive, tol))
    ok(naive > bound and naive > fa["rate"],
       "%s: the naive 5-look test is inflated (%.4f > %.4f), the "
       "sequential test is not" % (kind, naive, bound))
    s = d["srm"]
    srm_false += s["harm_runs"]
    srm_naive += round(s["naive"]["rate"] * R)
    srm_runs += R
    ok(d["refused_records"] == 0, "%s: the engine took every record" % kind)

rate = srm_false / srm_runs
bound = ALPHA + 3 * se0(ALPHA, srm_runs)
comment("srm A/A: %d runs, false alarms %.4f, naive chi-square at 5 looks "
        "%.4f" % (srm_runs, rate, srm_naive / srm_runs))
ok(rate <= bound, "srm: A/A false-alarm rate %.4f <= alpha + 3 SE = %.4f"
   % (rate, bound))
ok(srm_naive / srm_runs > bound, "srm: the naive chi-square at 5 looks is "
   "inflated (%.4f > %.4f)" % (srm_naive / srm_runs, bound))

# Power: detection probability and time to detection beside the
# fixed-horizon size.
for kind in ("mean", "proportion", "rate", "quantile"):
    effect, tick = EFFECT[kind]
    d = simulate(kind, 200, 16001, tick, ["--effect", effect])
    t = d["tests"][0]
    det, fixed = t["detection"], t["fixed_horizon"]
    comment("%s, effect %s: detected %.3f; records to harm median %s, "
            "90th percentile %s; fixed horizon (80%% power, one look) %s "
            "records" % (kind, effect, det["probability"],
                         det["median_records"], det["p90_records"],
                         fixed["records"]))
    ok(det["probability"] >= 0.9, "%s: a harmful effect (%s) is detected "
       "in %.3f of runs (>= 0.9)" % (kind, effect, det["probability"]))
    if kind == "mean":
        # normal data, sd 20, +3 shift, 50/50, one-sided at alpha, power 0.8
        z = norm.ppf(1 - ALPHA) + norm.ppf(0.8)
        want = z * z * (400 / 0.5 + 400 / 0.5) / 9
        ok(abs(fixed["units"] - want) <= 0.02 * want,
           "mean: fixed-horizon size %d units matches scipy's %.0f (2%%: "
           "the variances come from a pilot sample)" % (fixed["units"],
                                                        want))

# The same figures for any number of workers.
a = simulate("mean", 60, 2001, 1, jobs=1)
b = simulate("mean", 60, 2001, 1, jobs=2)
a.pop("jobs")
b.pop("jobs")
ok(a == b, "results do not depend on -j")

print("1..%d" % n_tests)
sys.exit(1 if failed else 0)
