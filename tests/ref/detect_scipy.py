"""detect_scipy: the change detector (src/core/stats/detect.c) against
numpy/scipy and the exact average run length of Page's CUSUM.

What is checked, each against a reference computed here:
  - the probe's normal generator (used only by its simulations) against
    scipy.stats.kstest, so the simulations below rest on sound draws;
  - the log-spaced grid against numpy.geomspace, and bad grids refused;
  - log M and the change start, block by block, on random sequences
    (blocks that must be skipped included) against a numpy brute force
    over every start time and grid point (no recursion), and
    Page's/Shiryaev-Roberts recursions against docs/methods.md sec. 19, check value E1;
  - the exact ARL of Page's CUSUM (Page 1954) by the Nystrom method on
    the integral equation L(w) = 1 + F(-w) L(0) + int_0^h f(y - w) L(y) dy
    (Gauss-Legendre nodes, scipy.stats.norm), itself checked against the
    values printed in docs/methods.md sec. 19, check value E3 and between 200 and 400 nodes;
  - a simulation through stopcock's stats_detect_* with one grid point
    (= Page's CUSUM) against that exact ARL, within 4 Monte Carlo
    standard errors, in and out of control, at two scales of information;
  - the mixture detector's simulated ARL at c = 50 is >= c, the guarantee
    of e-detectors (Shin, Ramdas & Rinaldo 2023), and its false-alarm
    frequency within T blocks is <= T / c.
Reported, not asserted: the detection delay of the mixture against a
CUSUM tuned at the true effect with the same threshold, at the default
log c = log(20 * 30 * 86400 / 0.05) (20 series, a block a second for 30
days, 0.05 expected false alarms). `--report` runs the full table;
`--values` prints the brute-force check values of tests/unit/test_detect.c.

Env STOPCOCK_BUILD is the build directory holding tests/detectprobe.
Prints TAP; exits 1 on any failure.
"""
import math
import os
import subprocess
import sys

import numpy as np
from scipy import special, stats

SEED = 20261202
build = os.environ.get("STOPCOCK_BUILD", "build")
probe = os.path.join(build, "tests", "detectprobe")
rng = np.random.default_rng(SEED)
results = []
notes = []
LOG_C_DEFAULT = math.log(20 * 30 * 86400 / 0.05)


def ask(lines):
    """Run the probe on the lines; return a list of float arrays."""
    out = subprocess.run([probe], input="\n".join(lines) + "\n",
                         capture_output=True, text=True, check=True,
                         timeout=300).stdout.splitlines()
    if len(out) != len(lines):
        raise RuntimeError("detectprobe answered %d of %d lines"
                           % (len(out), len(lines)))
    vals = []
    for q, a in zip(lines, out):
        if a.startswith("error"):
            raise RuntimeError("detectprobe: %s -> %s" % (q[:80], a))
        vals.append(np.array([float(t) for t in a.split()]))
    return vals


def check(good, name, detail=""):
    results.append((bool(good), name, detail))


def fmt(*xs):
    return " ".join(repr(float(x)) for x in xs)


# ---- the probe's generator ----
draws = ask(["normals 7 100000"])[0]
ks = stats.kstest(draws, "norm")
r1 = float(np.corrcoef(draws[:-1], draws[1:])[0, 1])
check(ks.pvalue > 1e-3 and abs(r1) < 4 / math.sqrt(len(draws)),
      "probe normals vs scipy kstest", "# KS p %.3g, lag-1 r %.2g"
      % (ks.pvalue, r1))

# ---- grid ----
worst = 0.0
lines, refs = [], []
for k in range(1, 13):
    lo = float(np.exp(rng.uniform(math.log(1e-4), math.log(1))))
    hi = lo * float(np.exp(rng.uniform(0, math.log(1e3))))
    lines.append("init " + fmt(lo, hi, k))
    refs.append(np.geomspace(lo, hi, k) if k > 1 else np.array([lo]))
bad = [(0, 1, 3), (-1, 1, 3), (1, 0.5, 3), (1, math.inf, 3),
       (math.nan, 1, 3), (0.1, 1, 0), (0.1, 1, 13)]
for lo, hi, k in bad:
    lines.append("init " + fmt(lo, hi, k))
got = ask(lines)
ok = True
for g, r in zip(got, refs):
    ok &= g[0] == 0 and len(g) == len(r) + 1
    if ok:
        worst = max(worst, float(np.max(np.abs(g[1:] / r - 1))))
ok &= all(len(g) == 1 and g[0] == -1 for g in got[len(refs):])
check(ok and worst < 1e-13, "grid vs numpy.geomspace; %d bad grids refused"
      % len(bad), "# max rel err %.2g" % worst)


# ---- recursions against a brute force over starts ----
def brute(lam, X, I):
    """log M_b and change start per block by enumerating starts."""
    K = len(lam)
    lw = np.full(K, -math.log(K))
    keep = [b for b in range(len(X)) if I[b] > 0 and np.isfinite(I[b])
            and np.isfinite(X[b])]
    outm, outs = [], []
    for b in range(len(X)):
        used = [j for j in keep if j <= b]
        if not used:
            outm.append(-math.inf)
            outs.append(math.nan)
            continue
        best_k, best_s = np.full(K, -math.inf), np.zeros(K)
        for k in range(K):
            for a in range(len(used)):
                s = sum(lam[k] * X[j] - lam[k] ** 2 * I[j] / 2
                        for j in used[a:])
                if s >= best_k[k]:          # ties: the later start
                    best_k[k], best_s[k] = s, used[a] + 1
        tot = lw + best_k
        outm.append(float(special.logsumexp(tot)))
        outs.append(float(best_s[int(np.argmax(tot))]))
    return np.array(outm), np.array(outs)


def seq_line(lo, hi, k, X, I):
    return "seq " + fmt(lo, hi, k) + " " + " ".join(
        fmt(x, i) for x, i in zip(X, I))


cases = []
for c in range(40):
    k = int(rng.integers(1, 13))
    n = int(rng.integers(1, 25))
    info = float(np.exp(rng.uniform(math.log(0.1), math.log(1e4))))
    lo = float(np.exp(rng.uniform(-3, 0))) / math.sqrt(info)
    hi = lo * float(np.exp(rng.uniform(0, 5)))
    mu = np.where(np.arange(n) >= n // 2, rng.uniform(0, 3), 0) \
        / math.sqrt(info)
    I = info * rng.uniform(0.5, 2, n)
    X = (mu + rng.standard_normal(n) / np.sqrt(I)) * I
    if c % 4 == 3 and n > 3:                # blocks the detector skips
        I[1], X[2] = 0.0, math.nan
        I[3] = -1.0
    cases.append((lo, hi, k, X, I))
got = ask([seq_line(*cs) for cs in cases])
worst, wstart = 0.0, 0
for g, (lo, hi, k, X, I) in zip(got, cases):
    lam = np.geomspace(lo, hi, k) if k > 1 else np.array([lo])
    bm, bs = brute(lam, X, I)
    gm, gs = g[0::2], g[1::2]
    fin = np.isfinite(bm)
    if not np.array_equal(fin, np.isfinite(gm)):
        worst = math.inf
        continue
    worst = max(worst, float(np.max(np.abs(gm[fin] - bm[fin]) /
                                   np.maximum(1, np.abs(bm[fin])),
                                   initial=0)))
    wstart += int(np.sum(gs[fin] != bs[fin]))
check(worst < 1e-11 and wstart == 0,
      "log M and change start vs numpy brute force over starts "
      "(%d sequences)" % len(cases),
      "# max err %.2g, %d wrong starts" % (worst, wstart))

# docs/methods.md sec. 19, check value E1 (z, lambda = 1): CUSUM and SR recursions
z = [0.3, -1.2, 0.8, 2.1, 1.7, 0.4, 2.5, 1.9]
e1_cu = [-0.2, -1.7, 0.3, 1.9, 3.1, 3, 5, 6.4]
e1_sr = [-0.2, -1.101861131, 0.586870851, 2.629030776, 3.898695221,
         3.818760892, 5.84047834, 7.243381574]
cu = ask([seq_line(1, 1, 1, z, [1] * 8)])[0][0::2]
sr, r = [], -math.inf
for zi in z:
    r = ask(["sr " + fmt(r, zi - 0.5)])[0][0]
    sr.append(r)
check(np.max(np.abs(cu - e1_cu)) < 1e-12 and
      np.max(np.abs(np.array(sr) - e1_sr)) < 5e-9,
      "E1 CUSUM and SR recursions (docs/methods.md sec. 19, check value E1)")
thr = ask(["threshold 51840000 20", "threshold 0.5 20", "threshold 10 0"])
check(abs(thr[0][0] - LOG_C_DEFAULT) < 1e-12 and np.isnan(thr[1][0]) and
      np.isnan(thr[2][0]), "threshold log(series * arl) vs math.log")


# ---- exact ARL of Page's CUSUM by the Nystrom method ----
def page_arl(mu, sigma, h, nodes):
    """ARL from W = 0 of W_b = max(0, W_{b-1} + l_b) >= h, l ~ N(mu, s^2)."""
    x, a = np.polynomial.legendre.leggauss(nodes)
    y = (x + 1) * h / 2
    a = a * h / 2
    w = np.concatenate(([0.0], y))          # unknowns L(0), L(y_j)
    A = np.zeros((nodes + 1, nodes + 1))
    A[:, 0] = stats.norm.cdf((0 - w - mu) / sigma)
    A[:, 1:] = a * stats.norm.pdf((y[None, :] - w[:, None] - mu) / sigma) \
        / sigma
    L = np.linalg.solve(np.eye(nodes + 1) - A, np.ones(nodes + 1))
    return float(L[0])


# (delta, h, ARL0, ARL1) from docs/methods.md sec. 19, check value E3 [C Nystrom there]
E3 = [(1.0, math.log(100), 623.3197423, 9.588329856),
      (1.0, math.log(1000), 6350.938529, 14.18788736),
      (0.5, math.log(1000), 14245.16491, 51.94801131)]
exact = {}
for dl, h, a0, a1 in E3:
    for name, mu, want in (("ARL0", -dl * dl / 2, a0), ("ARL1", dl * dl / 2,
                                                        a1)):
        v200 = page_arl(mu, dl, h, 200)
        v400 = page_arl(mu, dl, h, 400)
        exact[(dl, h, name)] = v400
        # printed to 10 significant digits
        check(abs(v400 - want) <= 6e-10 * want and
              abs(v200 - v400) <= 1e-9 * v400,
              "Nystrom %s delta %g h log %d vs docs/methods.md sec. 19, check value E3" %
              (name, dl, round(math.exp(h))),
              "# %.10g (E3 %.10g; 200 nodes %.10g)" % (v400, want, v200))


# ---- simulations through stopcock ----
def sim(lo, hi, k, info, mu0, mu1, pre, logc, runs, seed, mx):
    return ask(["sim " + fmt(lo, hi, k, info, mu0, mu1, pre, logc, runs,
                             seed, mx)])[0]


def mean_se(v):
    return float(np.mean(v)), float(np.std(v, ddof=1) / math.sqrt(len(v)))


# Page's CUSUM = one grid point; the excess lambda at information I is
# delta = lambda sqrt(I) standard deviations of a block's score. The
# second row reuses the first's seed: at lambda 0.1, I 100 the log ratios
# are the same numbers, so equal run lengths show the scaling in I.
for (lam, info, dl, h, runs, arl) in (
        (1.0, 1.0, 1.0, math.log(100), 20000, "ARL0"),
        (0.1, 100.0, 1.0, math.log(100), 20000, "ARL0"),
        (1.0, 1.0, 1.0, math.log(100), 20000, "ARL1"),
        (1.0, 1.0, 1.0, math.log(1000), 4000, "ARL0"),
        (0.02, 625.0, 0.5, math.log(1000), 20000, "ARL1")):
    mu1 = 0.0 if arl == "ARL0" else lam
    v = sim(lam, lam, 1, info, 0, mu1, 0, h, runs, SEED + runs, 10 ** 6)
    m, se = mean_se(v)
    want = exact[(dl, h, arl)]
    check(np.all(v > 0) and abs(m - want) <= 4 * se,
          "simulated %s of stats_detect (1 point, lambda %g, I %g) vs "
          "Nystrom %.7g" % (arl, lam, info, want),
          "# %d runs: %.4g +- %.3g" % (runs, m, se))

# the mixture's guarantee: E[N] >= c and P(N <= T) <= T / c
for lo, hi, k in ((0.1, 3.0, 12), (0.02, 1.0, 12), (0.5, 0.5, 12)):
    c = 50.0
    v = sim(lo, hi, k, 1.0, 0, 0, 0, math.log(c), 2000, SEED + 7, 10 ** 6)
    m, se = mean_se(v)
    T = 10
    frac = float(np.mean(v <= T))
    check(np.all(v > 0) and m >= c and frac <= T / c,
          "mixture [%g, %g] x %d: simulated ARL >= c = %g, P(N <= %d) <= "
          "%d/c" % (lo, hi, k, c, T, T),
          "# 2000 runs: ARL %.4g +- %.3g, P(N <= %d) %.4f" %
          (m, se, T, frac))


# ---- reported: delay of the mixture against a CUSUM at the true effect ----
def delay_table(grids, deltas, runs, pre):
    rows = []
    for dl in deltas:
        mx = int(50 * LOG_C_DEFAULT / (dl * dl)) + 1000
        ref = sim(dl, dl, 1, 1.0, 0, dl, 0, LOG_C_DEFAULT, runs, SEED + 11,
                  mx)
        for lo, hi, k in grids:
            row = [dl, lo, hi, k, float(np.mean(ref)), float(np.median(ref))]
            for p in pre:
                v = sim(lo, hi, k, 1.0, 0, dl, p, LOG_C_DEFAULT, runs,
                        SEED + 13, mx)
                fa = int(np.sum(v < 0))
                cens = int(np.sum(v == 0))
                d = v[v > 0]
                row += [float(np.mean(d)), float(np.median(d)),
                        float(np.percentile(d, 90)), fa, cens]
            rows.append(row)
    return rows


def print_delays(rows, pre):
    notes.append("delay at log c = %.4f (I = 1 per block; delta = effect in "
                 "block sd; grid in the same units)" % LOG_C_DEFAULT)
    hdr = "delta grid          CUSUM(delta) mean/med"
    for p in pre:
        hdr += " | after %d: mean med p90 ratio(mean, med)" % p
    notes.append(hdr)
    for r in rows:
        dl, lo, hi, k, cm, cmed = r[:6]
        s = "%-5g [%g,%g]x%d  %.1f/%.0f" % (dl, lo, hi, k, cm, cmed)
        for i in range(len(pre)):
            m, med, p90, fa, cens = r[6 + 5 * i: 11 + 5 * i]
            s += " | %.1f %.0f %.0f %.3f %.3f" % (m, med, p90, m / cm,
                                                  med / cmed)
            if fa or cens:
                s += " (%d false, %d censored)" % (fa, cens)
        notes.append(s)


if "--values" in sys.argv:
    # check values for tests/unit/test_detect.c: docs/methods.md sec. 19, check value E2's block
    # excesses, I = 100, grid [0.02, 0.5] x 12, by brute force
    d = [0.05, -0.12, 0.02, 0.08, -0.06, 0.01, -0.03, 0.04, 0.25, 0.31, 0.22,
         0.28]
    lam = np.geomspace(0.02, 0.5, 12)
    bm, bs = brute(lam, [x * 100 for x in d], [100.0] * 12)
    for b in range(12):
        print("%d %.12g %g" % (b + 1, bm[b], bs[b]))
    sys.exit(0)

if "--report" in sys.argv:
    pre = [0, 20000]
    rows = delay_table([(0.01, 4, 12), (0.03, 3, 12), (0.05, 2, 12),
                        (0.1, 1, 12)],
                       [0.03, 0.1, 0.3, 1.0], 400, pre)
else:
    pre = [0, 2000]
    rows = delay_table([(0.01, 4, 12)], [0.1, 0.5], 200, pre)
print_delays(rows, pre)

failed = 0
print("1..%d" % len(results))
for i, (good, name, detail) in enumerate(results, 1):
    if not good:
        failed += 1
    print("%s %d %s %s" % ("ok" if good else "not ok", i, name, detail))
for n in notes:
    print("# " + n)
sys.exit(1 if failed else 0)
