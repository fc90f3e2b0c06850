"""stats_scipy: the statistics module (src/core/stats) against scipy.

scipy/numpy are the outside reference: each family draws argument sets
from a fixed seed, asks the statsprobe tool for our values, computes the
same quantity with scipy, and prints one TAP line with the largest error.

References used:
  - scipy.special: betaln, log_ndtr, ndtri, chdtrc, gammaln, betainc.
  - scipy.stats.beta.cdf/sf (Boost's ibeta): the incomplete beta for all
    sizes. scipy.special.betainc (Cephes) is checked only for a, b <= 1e4,
    because at a, b ~ 3e6 it is off by ~3e-4 while Boost and we agree.
  - Boost itself drifts by ~2e-5 when both a, b exceed ~1e11 (checked
    against a 40-digit normal-limit computation), so draws stop at 1e10.
  - Deep tails that underflow double (I < 1e-300): for integer a, b,
    I_x(a, b) = P(Binomial(a+b-1, x) >= a), summed from scipy's
    binom.logpmf in log space (python3-mpmath is not installed here;
    when it is, it is used as a further check).
  - Dirichlet-multinomial and rate Bayes factors, their confidence sets,
    the Bernoulli CS and the quantile CS: re-implemented below from
    docs/methods.md sec. 3-5 with scipy.special and scipy.optimize.brentq.

Env STOPCOCK_BUILD is the build directory holding tests/statsprobe.
Prints TAP; exits 1 on any failure.
"""
import functools
import math
import os
from decimal import Decimal, getcontext
import subprocess
import sys

import numpy as np
from scipy import integrate, optimize, special, stats

SEED = 20240918
build = os.environ.get("STOPCOCK_BUILD", "build")
probe = os.path.join(build, "tests", "statsprobe")
rng = np.random.default_rng(SEED)
results = []


def ask(lines):
    """Run statsprobe on the lines; return a list of float tuples."""
    out = subprocess.run([probe], input="\n".join(lines) + "\n",
                         capture_output=True, text=True, check=True,
                         timeout=120).stdout.splitlines()
    if len(out) != len(lines):
        raise RuntimeError("statsprobe answered %d of %d lines"
                           % (len(out), len(lines)))
    vals = []
    for q, a in zip(lines, out):
        if a.startswith("error"):
            raise RuntimeError("statsprobe: %s -> %s" % (q, a))
        vals.append(tuple(float(t) for t in a.split()))
    return vals


def family(name, lines, refs, tol, rel=True, floor=0.0):
    """Compare first values; error = |d| / max(|ref|, floor) if rel."""
    got = ask(lines)
    worst, wline = 0.0, ""
    for g, r, q in zip(got, refs, lines):
        g = g[0]
        if g == r:
            e = 0.0
        elif math.isinf(r) or math.isinf(g):
            e = 0.0 if g == r else math.inf
        elif math.isnan(g) or math.isnan(r):
            e = math.inf
        else:
            e = abs(g - r)
            if rel:
                e /= max(abs(r), floor)
        if e > worst:
            worst, wline = e, "%s: got %.17g want %.17g" % (q, g, r)
    results.append((worst <= tol, name, len(lines), worst, tol, wline))


def logspace(lo, hi, n):
    return np.exp(rng.uniform(math.log(lo), math.log(hi), n))


def fmt(*xs):
    return " ".join(repr(float(x)) for x in xs)


# ---- incomplete beta ----
def betainc_cases(n):
    """(a, b, x) over small, moderate and huge a, b, x around the mean."""
    cases = []
    for lo, hi in [(0.05, 10), (10, 1000), (1000, 2e5), (2e5, 1e9)]:
        a = logspace(lo, hi, n)
        b = logspace(lo, hi, n)
        for ai, bi in zip(a, b):
            m = ai / (ai + bi)
            sd = math.sqrt(m * (1 - m) / (ai + bi + 1))
            x = m + rng.normal() * sd * rng.choice([0.3, 2, 8, 30])
            x = min(max(x, 1e-300), 1 - 1e-12)
            cases.append((ai, bi, x))
    # x within 1e-6..1e-14 of an end, far from the mean
    for ai, bi in zip(logspace(0.05, 50, n), logspace(0.05, 50, n)):
        e = float(logspace(1e-14, 1e-6, 1)[0])
        cases.append((ai, bi, 1 - e))
        cases.append((ai, bi, e))
    return cases


cases = betainc_cases(120)
lines, refs = [], []
for a, b, x in cases:
    v = stats.beta.cdf(x, a, b)
    if 1e-300 < v < 1:
        lines.append("log_betainc " + fmt(a, b, x))
        refs.append(math.log(v))
# compare log values in absolute terms: a relative error of I
family("log_betainc lower vs scipy.stats.beta.cdf (Boost)", lines, refs,
       2e-6, rel=False)

lines, refs = [], []
for a, b, x in cases:
    v = stats.beta.sf(x, a, b)
    if 1e-300 < v < 1:
        lines.append("log_betainc_upper " + fmt(a, b, x))
        refs.append(math.log(v))
family("log_betainc_upper vs scipy.stats.beta.sf (Boost)", lines, refs,
       2e-6, rel=False)

# mixed sizes: one parameter small, the other up to 1e10, x anywhere
# from the far tails to within a few 1/(a+b) of 0 or 1 (series, continued
# fraction and reflection branches)
lines, refs = [], []
for i in range(1500):
    a, b = logspace(1e-3, 1e10, 2)
    m = a / (a + b)
    sd = math.sqrt(m * (1 - m) / (a + b + 1))
    x = m + rng.normal() * sd * rng.choice([0.3, 2, 8, 30])
    x = min(max(x, 1e-300), 1 - 1e-15)
    with np.errstate(all="ignore"):
        v = stats.beta.cdf(x, a, b)
    if 1e-300 < v < 1:
        lines.append("log_betainc " + fmt(a, b, x))
        refs.append(math.log(v))
family("log_betainc mixed sizes to 1e10 vs scipy.stats.beta.cdf", lines,
       refs, 2e-6, rel=False)

lines, refs = [], []
for a, b, x in cases:
    if a <= 1e4 and b <= 1e4:
        v = special.betainc(a, b, x)
        if 1e-300 < v < 1:
            lines.append("log_betainc " + fmt(a, b, x))
            refs.append(math.log(v))
family("log_betainc vs scipy.special.betainc (a, b <= 1e4)", lines, refs,
       2e-6, rel=False)


def binom_tail_log(a, b, x):
    """log I_x(a, b) = log P(Bin(a+b-1, x) >= a), integer a, b, x < mean."""
    n = a + b - 1
    j = np.arange(a, min(n, a + 200000) + 1)
    return float(special.logsumexp(stats.binom.logpmf(j, n, x)))


lines, refs = [], []
for i in range(150):
    a = int(logspace(1, 1e6, 1)[0])
    b = int(logspace(1, 1e6, 1)[0])
    m = a / (a + b)
    # far below the mean: I below 1e-300 in most draws
    x = m * rng.uniform(0.01, 0.7)
    if x <= 0:
        continue
    ref = binom_tail_log(a, b, x)
    lines.append("log_betainc " + fmt(a, b, x))
    refs.append(ref)
    # and the mirror image through the upper tail
    lines.append("log_betainc_upper " + fmt(b, a, 1 - x))
    refs.append(ref)
family("log_betainc deep tails vs binom.logpmf sums", lines, refs, 2e-6,
       rel=True, floor=1.0)

try:
    import mpmath  # only if Debian's python3-mpmath happens to be there
    mpmath.mp.dps = 40
    lines, refs = [], []
    for a, b, x in cases[:200]:
        v = mpmath.betainc(a, b, 0, x, regularized=True)
        if v > 0:
            lines.append("log_betainc " + fmt(a, b, x))
            refs.append(float(mpmath.log(v)))
    family("log_betainc vs mpmath", lines, refs, 2e-6, rel=True, floor=1.0)
except ImportError:
    pass

# ---- log beta, log Phi, Phi^-1, chi-square ----
a = logspace(1e-3, 1e12, 400)
b = logspace(1e-3, 1e12, 400)
# Cephes' betaln is only good to a few 1e-9 for a << b ((0.006, 7.5e5) is
# off by 1.4e-9, (6.5e5, 0.22) by 3e-9; both checked against the 50-digit
# Stirling series below, which is the tight check)
family("log_beta vs scipy.special.betaln",
       ["log_beta " + fmt(x, y) for x, y in zip(a, b)],
       [float(special.betaln(x, y)) for x, y in zip(a, b)], 2e-8,
       floor=1.0)


def lbeta_decimal(x, y):
    """log B(x, y) for y >= 1e4: Stirling's series in 50-digit decimals
    for lgamma(y) - lgamma(x + y), math.lgamma (or Stirling) for x."""
    getcontext().prec = 50
    bern = [Decimal(1) / 12, -Decimal(1) / 360, Decimal(1) / 1260,
            -Decimal(1) / 1680, Decimal(1) / 1188]

    def stir(t):
        v = (t - Decimal("0.5")) * t.ln() - t
        for i, c in enumerate(bern):
            v += c / t ** (2 * i + 1)
        return v
    dx, dy = Decimal(float(x)), Decimal(float(y))
    half_log_2pi = (2 * Decimal("3.14159265358979323846264338327950288"
                                "41971693993751")).ln() / 2
    lx = stir(dx) + half_log_2pi if x >= 1e4 else Decimal(math.lgamma(x))
    return float(lx + stir(dy) - stir(dx + dy))


a = logspace(1e-3, 1e12, 200)
b = logspace(1e4, 1e12, 200)
family("log_beta vs 50-digit Stirling series (b >= 1e4)",
       ["log_beta " + fmt(x, y) for x, y in zip(a, b)],
       [lbeta_decimal(x, y) for x, y in zip(a, b)], 1e-13, floor=1.0)

z = np.concatenate([rng.uniform(-45, 40, 300), -logspace(1, 1e5, 100)])
family("log_ndtr vs scipy.special.log_ndtr",
       ["log_ndtr " + fmt(x) for x in z],
       [float(special.log_ndtr(x)) for x in z], 1e-12, floor=1e-300)

p = np.concatenate([logspace(1e-300, 0.5, 200), 1 - logspace(1e-16, 0.5,
                                                            100)])
family("norm_ppf vs scipy.special.ndtri",
       ["norm_ppf " + fmt(x) for x in p],
       [float(special.ndtri(x)) for x in p], 1e-12, floor=1e-300)

x = logspace(1e-3, 2000, 300)
df = rng.integers(1, 40, 300).astype(float)
lines, refs = [], []
for xi, di in zip(x, df):
    v = float(stats.chi2.sf(xi, di))
    if v > 1e-300:
        lines.append("chi2_sf " + fmt(xi, di))
        refs.append(v)
family("chi2_sf vs scipy.stats.chi2.sf", lines, refs, 1e-10)
family("chi2_sf vs scipy.special.chdtrc", lines,
       [float(special.chdtrc(float(q.split()[2]), float(q.split()[1])))
        for q in lines], 1e-10)

# ---- Dirichlet-multinomial Bayes factor (docs/methods.md sec. 3) ----


def dm_ref(c, th, a0):
    c, th, a0 = map(np.asarray, (c, th, a0))
    th = th / th.sum()
    return float(special.gammaln(a0.sum()) - special.gammaln(a0.sum()
                 + c.sum()) + np.sum(special.gammaln(a0 + c)
                                     - special.gammaln(a0))
                 - np.sum(special.xlogy(c, th)))


lines, refs = [], []
for i in range(300):
    K = int(rng.integers(2, 6))
    th = rng.dirichlet(np.ones(K) * 3)
    N = float(logspace(1, 1e6, 1)[0])
    # counts near or off the null
    pr = th if rng.random() < 0.5 else rng.dirichlet(th * 200)
    c = rng.multinomial(int(N), pr).astype(float)
    a0 = th * float(logspace(0.5, 1e4, 1)[0])
    lines.append("dm_log_bf %d %s %s %s" % (K, fmt(*c), fmt(*th), fmt(*a0)))
    refs.append(dm_ref(c, th, a0))
# gammaln's own rounding is ~1e-16 of lgamma(N) ~ N log N per term
family("dm_log_bf vs numpy/scipy gammaln (N <= 1e6)", lines, refs, 2e-8,
       rel=True, floor=1.0)

lines, refs = [], []
for i in range(60):
    th = rng.dirichlet(np.ones(2) * 3)
    N = float(logspace(1e7, 1e9, 1)[0])
    c = rng.multinomial(int(N), th).astype(float)
    a0 = th * 100
    lines.append("dm_log_bf 2 %s %s %s" % (fmt(*c), fmt(*th), fmt(*a0)))
    refs.append(dm_ref(c, th, a0))
# gammaln in double loses ~1e-6 absolute at 1e9 (docs/methods.md sec. 9)
family("dm_log_bf vs scipy gammaln (N up to 1e9)", lines, refs, 2e-5,
       rel=False)

# ---- rate Bayes factors (docs/methods.md sec. 5) ----


def rate_ref(na, nb, th, k, one, th1=None):
    th1 = 1 - th if th1 is None else th1
    a, b = k * th, k * th1
    v = (special.betaln(a + nb, b + na) - special.betaln(a, b)
         - special.xlogy(nb, th) - special.xlogy(na, th1))
    if one:
        v += (math.log(stats.beta.sf(th, a + nb, b + na))
              - math.log(stats.beta.sf(th, a, b)))
    return float(v)


lines2, refs2, lines1, refs1 = [], [], [], []
for i in range(300):
    ea, eb = logspace(10, 1e6, 2)
    th = eb / (ea + eb)
    lam = float(logspace(1e-4, 1e-1, 1)[0])
    ratio = float(rng.choice([1.0, 1.2, 0.8, 2.0]))
    na = float(rng.poisson(lam * ea))
    nb = float(rng.poisson(lam * eb * ratio))
    k = float(logspace(1, 1e4, 1)[0])
    lines2.append("rate_log_bf " + fmt(na, nb, th, k, 0))
    refs2.append(rate_ref(na, nb, th, k, 0))
    a, b = k * th, k * (1 - th)
    if stats.beta.sf(th, a + nb, b + na) > 1e-300:
        lines1.append("rate_log_bf " + fmt(na, nb, th, k, 1))
        refs1.append(rate_ref(na, nb, th, k, 1))
family("rate_log_bf two-sided vs scipy betaln", lines2, refs2, 1e-9,
       rel=True, floor=1.0)
family("rate_log_bf one-sided vs scipy betaln + beta.sf", lines1, refs1,
       2e-6, rel=True, floor=1.0)

# rate-ratio CS: invert the two-sided BF over r with brentq


def ratio_cs_ref(na, ea, nb, eb, k, alpha):
    sa, sb = ea / (ea + eb), eb / (ea + eb)

    def f(lr):
        # logit(theta_r) = lr + log(sb/sa); both theta and 1 - theta exact
        lt = lr + math.log(sb / sa)
        th, th1 = special.expit(lt), special.expit(-lt)
        return rate_ref(na, nb, th, k, 0, th1) - math.log(1 / alpha)
    l0 = math.log((nb / eb) / (na / ea))
    lo_b = l0 - 1
    while f(lo_b) < 0 and lo_b > -500:
        lo_b -= 1
    hi_b = l0 + 1
    while f(hi_b) < 0 and hi_b < 500:
        hi_b += 1
    lo = 0.0 if f(lo_b) < 0 else math.exp(
        optimize.brentq(f, lo_b, l0, xtol=1e-14))
    hi = math.inf if f(hi_b) < 0 else math.exp(
        optimize.brentq(f, l0, hi_b, xtol=1e-14))
    return lo, hi


lines, rlo, rhi = [], [], []
for i in range(120):
    ea, eb = logspace(100, 1e5, 2)
    lam = float(logspace(1e-2, 1, 1)[0])
    na = float(rng.poisson(lam * ea)) + 1
    nb = float(rng.poisson(lam * eb * rng.choice([1.0, 1.5]))) + 1
    k = float(logspace(2, 1e3, 1)[0])
    lo, hi = ratio_cs_ref(na, ea, nb, eb, k, 0.05)
    lines.append("rate_ratio_cs " + fmt(na, ea, nb, eb, k, 0.05))
    rlo.append(lo)
    rhi.append(hi)
family("rate_ratio_cs lower end vs brentq on scipy BF", lines, rlo, 1e-8)
got = ask(lines)
worst = max(0.0 if g[1] == h else abs(g[1] - h) / h
            for g, h in zip(got, rhi))
results.append((worst <= 1e-8, "rate_ratio_cs upper end vs brentq on scipy "
                "BF", len(lines), worst, 1e-8, ""))

# one-sided rate-ratio bounds: invert the one-sided BF (scipy betaln +
# beta.sf) with brentq, independently of the C bisection


def ratio_bound_ref(na, ea, nb, eb, k, alpha, upper):
    sa, sb = ea / (ea + eb), eb / (ea + eb)

    def f(lr):
        lt = lr + math.log(sb / sa)
        th, th1 = special.expit(lt), special.expit(-lt)
        if upper:
            v = rate_ref(nb, na, th1, k, 1, th)
        else:
            v = rate_ref(na, nb, th, k, 1, th1)
        return v - math.log(1 / alpha)
    l0 = math.log((nb / eb) / (na / ea))
    if upper:
        b = l0 + 1
        while f(b) < 0 and b < 60:
            b += 1
        return math.inf if f(b) < 0 else math.exp(
            optimize.brentq(f, l0, b, xtol=1e-13))
    b = l0 - 1
    while f(b) < 0 and b > -60:
        b -= 1
    return 0.0 if f(b) < 0 else math.exp(
        optimize.brentq(f, b, l0, xtol=1e-13))


# a stream of its own, so the draws of the checks below stay as they were
brng = np.random.default_rng(SEED + 1)
for upper in (0, 1):
    lines, refs = [], []
    for i in range(60):
        ea, eb = np.exp(brng.uniform(math.log(100), math.log(1e5), 2))
        lam = math.exp(brng.uniform(math.log(1e-2), math.log(0.3)))
        na = float(brng.poisson(lam * ea)) + 1
        nb = float(brng.poisson(lam * eb * brng.choice([1.0, 1.5]))) + 1
        k = math.exp(brng.uniform(math.log(2), math.log(1e3)))
        lines.append("rate_ratio_bound " + fmt(na, ea, nb, eb, k, 0.05,
                                               upper))
        refs.append(ratio_bound_ref(na, ea, nb, eb, k, 0.05, upper))
    family("rate_ratio_bound %s vs brentq on scipy one-sided BF"
           % ("upper" if upper else "lower"), lines, refs, 1e-7)

# ---- beta-binomial mixture and Bernoulli CS (docs/methods.md sec. 4) ----


def bb_ref(k, n, p, k0, one):
    """Beta-binomial BF, prior Beta(k0 p, k0 (1-p)); one: truncated > p."""
    a, b = k0 * p, k0 * (1 - p)
    v = (special.betaln(a + k, b + n - k) - special.betaln(a, b)
         - special.xlogy(k, p) - special.xlog1py(n - k, -p))
    if one:
        v += (math.log(stats.beta.sf(p, a + k, b + n - k))
              - math.log(stats.beta.sf(p, a, b)))
    return float(v)


lines2, refs2, lines1, refs1 = [], [], [], []
for i in range(300):
    p = float(rng.uniform(0.01, 0.99))
    n = float(int(logspace(1, 1e6, 1)[0]))
    k = float(rng.binomial(int(n), min(0.999, p * rng.choice([1, 1.05]))))
    k0 = float(logspace(0.5, 1e4, 1)[0])
    g, h = p, 1 - p
    s, v, r = k - n * p, n * p * (1 - p), k0 * p * (1 - p)
    lines2.append("bb_logm " + fmt(s, v, g, h, r, 0))
    refs2.append(bb_ref(k, n, p, k0, 0))
    if stats.beta.sf(p, k0 * p + k, k0 * (1 - p) + n - k) > 1e-300:
        lines1.append("bb_logm " + fmt(s, v, g, h, r, 1))
        refs1.append(bb_ref(k, n, p, k0, 1))
family("bb_logm two-sided vs beta-binomial BF (scipy)", lines2, refs2, 1e-8,
       rel=True, floor=1.0)
family("bb_logm one-sided vs truncated beta-binomial BF (scipy)", lines1,
       refs1, 2e-6, rel=True, floor=1.0)


def denom(alpha):
    lg = math.log(1 / alpha)
    return 2 * lg + math.log(1 + 2 * lg)


def bern_cs_ref(k, n, t_opt, alpha):
    k0 = max(t_opt / denom(alpha) - 1, 1e-3)
    L = math.log(1 / alpha)

    def f(p):
        return bb_ref(k, n, p, k0, 0) - L
    ph = k / n
    lo = 0.0 if k == 0 or f(1e-300) < 0 else optimize.brentq(
        f, 1e-300, min(ph, 1 - 1e-12), xtol=1e-15)
    hi = 1.0 if k == n or f(1 - 1e-16) < 0 else optimize.brentq(
        f, max(ph, 1e-12), 1 - 1e-16, xtol=1e-15)
    return lo, hi


lines, blo, bhi = [], [], []
for i in range(150):
    n = float(int(logspace(5, 1e6, 1)[0]))
    k = float(rng.binomial(int(n), float(rng.uniform(0.001, 0.999))))
    t_opt = float(logspace(10, 1e5, 1)[0])
    lo, hi = bern_cs_ref(k, n, t_opt, 0.05)
    lines.append("bernoulli_cs " + fmt(k, n, t_opt, 0.05))
    blo.append(lo)
    bhi.append(hi)
got = ask(lines)
worst = max(max(abs(g[0] - lo), abs(g[1] - hi))
            for g, lo, hi in zip(got, blo, bhi))
results.append((worst <= 1e-9, "bernoulli_cs vs brentq on scipy BF",
                len(lines), worst, 1e-9, ""))

# ---- quantile CS on random tie blocks (docs/methods.md sec. 4) ----


def bb_logm2_ref(s, v, g, h, r):
    gh = g + h
    return float((v / (g * h)) * math.log(gh)
                 - ((v + h * s) / (h * gh)) * math.log(g)
                 - ((v - g * s) / (g * gh)) * math.log(h)
                 + special.betaln((r + v - g * s) / (g * gh),
                                  (r + v + h * s) / (h * gh))
                 - special.betaln(r / (g * gh), r / (h * gh)))


def qbound_ref(v, g, r, alpha):
    L = math.log(1 / alpha)
    top = v / g
    if bb_logm2_ref(top, v, g, 1 - g, r) < L:
        return math.inf
    return optimize.brentq(lambda s: bb_logm2_ref(s, v, g, 1 - g, r) - L,
                           0, top, xtol=1e-12)


def quantile_cs_ref(vals, cnts, p, t_opt, alpha):
    t = float(cnts.sum())
    v = p * (1 - p) * t
    r = max(p * (1 - p) * t_opt / denom(alpha) - p * (1 - p),
            1e-3 * p * (1 - p))
    ulo, uup = qbound_ref(v, 1 - p, r, alpha), qbound_ref(v, p, r, alpha)
    ilo = math.floor(t * p - ulo) + 1 if ulo < math.inf else 0
    ihi = math.ceil(t * p + uup) if uup < math.inf else t + 1
    cum = np.cumsum(cnts)

    def at(i):
        return float(vals[np.searchsorted(cum, i)])
    return (at(ilo) if 1 <= ilo <= t else -math.inf,
            at(ihi) if 1 <= ihi <= t else math.inf)


lines, qlo, qhi = [], [], []
for i in range(80):
    nb = int(rng.integers(1, 300))
    vals = np.sort(rng.choice(np.arange(1, 5000), nb, replace=False)) * 0.5
    cnts = rng.integers(1, 50, nb)
    p = float(rng.choice([0.5, 0.9, 0.99, 0.1]))
    t_opt = float(logspace(10, 1e4, 1)[0])
    lo, hi = quantile_cs_ref(vals, cnts, p, t_opt, 0.05)
    lines.append("quantile_cs " + fmt(p, t_opt, 0.05) + " " + " ".join(
        "%r %d" % (float(x), int(c)) for x, c in zip(vals, cnts)))
    qlo.append(lo)
    qhi.append(hi)
got = ask(lines)
bad = sum(1 for g, lo, hi in zip(got, qlo, qhi) if g[0] != lo or g[1] != hi)
results.append((bad == 0, "quantile_cs vs brentq + numpy ranks", len(lines),
                float(bad), 0.0, "mismatches"))

# ---- two-sample quantile tests (docs/methods.md sec. 4), brute force ----


def log_beta_sf(x, a, b):
    """log P(Beta(a, b) > x); past scipy's underflow (x far above the
    mode, a, b >= 1) by quadrature of the density scaled at x: log f is
    concave, so it falls at least at its slope at x and 60 scale lengths
    hold all but e^-60 of the mass."""
    with np.errstate(divide="ignore", under="ignore"):
        v = stats.beta.sf(x, a, b)
    if v > 1e-280:
        return math.log(v)
    lf = lambda t: (a - 1) * math.log(t) + (b - 1) * math.log1p(-t)
    m = lf(x)
    slope = (a - 1) / x - (b - 1) / (1 - x)
    top = min(1.0, x + 60 / -slope)
    q, _ = integrate.quad(lambda t: math.exp(lf(t) - m), x, top,
                          epsabs=0, epsrel=1e-13, limit=200)
    return m + math.log(q) - float(special.betaln(a, b))


@functools.lru_cache(maxsize=None)
def bbf(c, n, g0, k0, one):
    """log m for c events of n, null g0: the beta-binomial Bayes factor."""
    a, b = k0 * g0, k0 * (1 - g0)
    v = (special.betaln(a + c, b + n - c) - special.betaln(a, b)
         - special.xlogy(c, g0) - special.xlog1py(n - c, -g0))
    if one:
        v += (log_beta_sf(g0, a + c, b + n - c) - log_beta_sf(g0, a, b))
    return float(v)


def two_sample_ref(va, ca, vb, cb, p, t_opt, one):
    k0 = max(t_opt / denom(0.05 * (2 if one else 1)) - 1, 1e-3)
    na, nb = float(ca.sum()), float(cb.sum())
    allv = np.unique(np.concatenate([va, vb]))
    cand = np.concatenate([allv, (allv[1:] + allv[:-1]) / 2])

    def cstar(n):
        # stationary point of the two-sided log m in c (digamma condition)
        fn = lambda c: (special.digamma(k0 * p + c)
                        - special.digamma(k0 * (1 - p) + n - c)
                        - math.log(p / (1 - p)))
        if fn(0) >= 0:
            return 0.0
        if fn(n) <= 0:
            return n
        return optimize.brentq(fn, 0, n, xtol=1e-12)
    sa, sb = cstar(na), cstar(nb)
    best = math.inf
    for x in cand:
        lt_a, le_a = float(ca[va < x].sum()), float(ca[va <= x].sum())
        lt_b, le_b = float(cb[vb < x].sum()), float(cb[vb <= x].sum())
        if one:
            val = (bbf(lt_a, na, p, k0, 1)
                   + bbf(nb - le_b, nb, 1 - p, k0, 1))
        else:
            val = (bbf(min(max(sa, lt_a), le_a), na, p, k0, 0)
                   + bbf(min(max(sb, lt_b), le_b), nb, p, k0, 0))
        best = min(best, val)
    return best


lines2, refs2, lines1, refs1 = [], [], [], []
for i in range(40):
    nba, nbb = rng.integers(1, 60, 2)
    grid = np.arange(1, 200) * 0.25
    va = np.sort(rng.choice(grid, nba, replace=False))
    vb = np.sort(rng.choice(grid, nbb, replace=False))
    ca = rng.integers(1, 400, nba)
    cb = rng.integers(1, 400, nbb)
    p = float(rng.choice([0.5, 0.9, 0.99]))
    t_opt = float(logspace(50, 1e4, 1)[0])
    arg = (fmt(p, t_opt) + " %d " % nba
           + " ".join("%r %d" % (float(x), int(c)) for x, c in zip(va, ca))
           + " " + " ".join("%r %d" % (float(x), int(c))
                            for x, c in zip(vb, cb)))
    lines2.append("quantile_log_e2 " + arg)
    refs2.append(two_sample_ref(va, ca, vb, cb, p, t_opt, False))
    lines1.append("quantile_log_e1 " + arg)
    refs1.append(two_sample_ref(va, ca, vb, cb, p, t_opt, True))
family("quantile_log_e2 vs brute-force scan (scipy)", lines2, refs2, 1e-8,
       floor=1.0)
family("quantile_log_e1 vs brute-force scan (scipy)", lines1, refs1, 2e-6,
       floor=1.0)

# ---- classical: chi-square SRM, z-test, sample size (docs/methods.md sec. 8) ----
lines, refs = [], []
for i in range(100):
    K = int(rng.integers(2, 8))
    th = rng.dirichlet(np.ones(K) * 5)
    c = rng.multinomial(int(logspace(10, 1e6, 1)[0]), th).astype(float)
    lines.append("srm_chi2 %d %s %s" % (K, fmt(*c), fmt(*th)))
    refs.append(float(stats.chisquare(c, c.sum() * th).pvalue))
family("srm_chi2 p vs scipy.stats.chisquare", lines, refs, 1e-9,
       floor=1e-300)

lines, refs = [], []
for i in range(100):
    na, nb = logspace(10, 1e6, 2).round()
    pa = float(rng.uniform(0.001, 0.5))
    xa = float(rng.binomial(int(na), pa))
    xb = float(rng.binomial(int(nb), pa * rng.choice([1, 1.1])))
    tab = np.array([[xa, na - xa], [xb, nb - xb]])
    if (tab.sum(axis=0) == 0).any():
        continue
    lines.append("ztest_prop " + fmt(xa, na, xb, nb))
    refs.append(float(stats.chi2_contingency(tab, correction=False)[1]))
family("ztest_prop p vs scipy chi2_contingency (no Yates)", lines, refs,
       1e-9, floor=1e-300)

lines, refs = [], []
for i in range(100):
    d = float(logspace(1e-3, 1, 1)[0])
    va, vb = logspace(1e-3, 10, 2)
    al = float(rng.choice([0.01, 0.05, 0.1]))
    pw = float(rng.choice([0.8, 0.9, 0.95]))
    lines.append("fixed_n " + fmt(d, va, vb, al, pw))
    refs.append(float((stats.norm.ppf(1 - al / 2) + stats.norm.ppf(pw)) ** 2
                      * (va + vb) / d ** 2))
family("fixed_n vs scipy.stats.norm.ppf", lines, refs, 1e-12)

failed = 0
print("1..%d" % len(results))
for i, (good, name, n, worst, tol, detail) in enumerate(results, 1):
    if good:
        print("ok %d %s # %d cases, max err %.3g (tol %.0e)"
              % (i, name, n, worst, tol))
    else:
        failed += 1
        print("not ok %d %s # %d cases, max err %.3g > %.0e; %s"
              % (i, name, n, worst, tol, detail))
sys.exit(1 if failed else 0)
