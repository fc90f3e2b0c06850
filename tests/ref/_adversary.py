"""Adversarial protocol streams of true-null experiments (helper).

Written outside the project's own generator (src/cli/scenario.c) on
purpose: the conditions below are the ones real traffic brings and our own
generator never produced (issue 10). Every run is its own experiment in
one stream, so one `stopcock replay` serves hundreds of runs; the alpha
family is per experiment, so the runs stay independent trials.

No condition plants real harm in a null run: the treatment is equal to the
control, better than it, or exactly at the margin (the boundary of the
null). A few "positive" runs per stream (ids starting with "p") do plant a
clear harm, so a stream whose test never looks at its data cannot pass
unnoticed; they never enter a false-alarm rate.

Lines are built as fixed-width byte matrices with numpy (digits by integer
division and a table of four-digit groups), never by per-line formatting:
a stream costs about as much CPU as the replay that reads it. Numbers
are zero-padded, which the protocol's decimal grammar allows; lines of
different kinds in one stream are padded with trailing blanks to one
width (blanks separate tokens, so a trailing run of them is no token).

Every record carries @TS. Lines are written in arrival order; TS is the
event time, so batching, lateness and lag show up as TS out of order.

attrs=True adds the optional attributes of include/stopcock/proto.h:
unit=ID on observe and count records of clustered data, epoch=N on the
late metric records of a ramp (the epoch the unit was exposed in).
Without them each record is its own unit and counts in the epoch current
when it arrives.
"""
import numpy as np

T0 = 1_800_000_000.0		# record time of the first run (2027)
ARMS = (b"ctl", b"trt")		# control first, as in a plan record

# ---- fixed-width line building ----


def _tab(strings):
    """Equal-length byte strings as an (k, w) uint8 table."""
    w = max(len(s) for s in strings)
    return np.frombuffer(b"".join(s.ljust(w) for s in strings),
                         np.uint8).reshape(len(strings), w)


_ARMTAB = _tab(ARMS)


def _const(s, n):
    return np.broadcast_to(np.frombuffer(s, np.uint8), (n, len(s)))


_QUAD = np.frombuffer(b"".join(b"%04d" % i for i in range(10000)),
                      np.uint8).reshape(10000, 4)


def _digits(x, w):
    """Non-negative integers as w zero-padded decimal digits (four digits
    per table look-up: integer division is the costly part)."""
    x = np.asarray(x, np.int64)
    if x.size and (x.min() < 0 or x.max() >= 10 ** w):
        raise ValueError("value outside 0..10^%d" % w)
    k = (w + 3) // 4
    cols = []
    for j in range(k - 1, -1, -1):
        q = x // 10 ** (4 * j) if j else x
        cols.append(_QUAD[q % 10000])
    out = np.concatenate(cols, axis=1) if k > 1 else cols[0]
    return out[:, 4 * k - w:]


def _width(x):
    m = int(x.max()) if x.size else 0
    return max(1, len(str(m)))


def _int(x):
    x = np.asarray(x, np.int64)
    return _digits(x, _width(x))


def _fix(x, dec):
    """Non-negative reals with dec decimals, zero-padded to one width."""
    xi = np.rint(np.asarray(x, np.float64) * 10 ** dec).astype(np.int64)
    if dec == 0:
        return _int(xi)
    d = _digits(xi, max(_width(xi), dec + 1))
    dot = _const(b".", len(xi))
    return np.concatenate([d[:, :-dec], dot, d[:, -dec:]], axis=1)


def _left(x):
    """Small positive integers without leading zeros, left-aligned and
    padded with blanks (for the last token of a line)."""
    x = np.asarray(x, np.int64)
    w = _width(x)
    d = _digits(x, w)
    nd = np.ones(len(x), np.int64)
    for j in range(1, w):
        nd += x >= 10 ** j
    src = np.arange(w)[None, :] + (w - nd)[:, None]
    ok = src < w
    out = np.take_along_axis(d, np.minimum(src, w - 1), axis=1)
    return np.where(ok, out, 32).astype(np.uint8)


def _ts(t):
    return np.concatenate([_const(b"@", len(t)), _fix(t, 3)], axis=1)


def _cat(n, cols):
    cols = [_const(c, n) if isinstance(c, bytes) else c for c in cols]
    return np.ascontiguousarray(np.concatenate(cols, axis=1))


def _attrs(n, unit=None, epoch=None):
    cols = []
    if unit is not None:
        cols += [b" unit=u", _digits(unit, 12)]
    if epoch is not None:
        cols += [b" epoch=", _left(epoch)]
    return cols


class Part:
    """Rows of one record kind with their arrival keys."""
    __slots__ = ("key", "rows")

    def __init__(self, key, rows):
        self.key = np.asarray(key, np.float64)
        self.rows = rows


def plan(ts, key, exp, weights):
    line = b"@%.3f plan %s %s" % (ts, exp, b" ".join(
        b"%s=%d" % (a, w) for a, w in zip(ARMS, weights)))
    return Part([key], np.frombuffer(line, np.uint8)[None, :])


def expose(ts, exp, arm, n=None, unit=None, key=None):
    m = len(ts)
    cols = [_ts(ts), b" expose " + exp + b" ", _ARMTAB[arm]]
    if n is not None:
        cols += [b" ", _int(n)]
    cols += _attrs(m, unit)
    return Part(ts if key is None else key, _cat(m, cols))


def observe(ts, exp, arm, metric, value, dec, unit=None, epoch=None,
            key=None):
    m = len(ts)
    cols = [_ts(ts), b" observe " + exp + b" ", _ARMTAB[arm],
            b" " + metric + b" ", _fix(value, dec)]
    cols += _attrs(m, unit, epoch)
    return Part(ts if key is None else key, _cat(m, cols))


def count(ts, exp, arm, metric, k, n, ndec=0, unit=None, epoch=None,
          key=None):
    m = len(ts)
    cols = [_ts(ts), b" count " + exp + b" ", _ARMTAB[arm],
            b" " + metric + b" ", _int(k), b" ", _fix(n, ndec)]
    cols += _attrs(m, unit, epoch)
    return Part(ts if key is None else key, _cat(m, cols))


def assemble(parts):
    """One block of parts as bytes in arrival order (stable: parts listed
    first win ties, so a plan precedes records stamped at its time)."""
    n = sum(len(p.key) for p in parts)
    w = max(p.rows.shape[1] for p in parts) + 1
    mat = np.full((n, w), 32, np.uint8)
    keys = np.empty(n)
    o = 0
    for p in parts:
        k = len(p.key)
        mat[o:o + k, :p.rows.shape[1]] = p.rows
        keys[o:o + k] = p.key
        o += k
    mat[:, -1] = 10
    order = np.argsort(keys, kind="stable")
    return mat[order].tobytes()


# ---- shared pieces of the conditions ----


def arrivals(rng, n, t0, dur):
    return t0 + np.sort(rng.uniform(0, dur, n))


def assign(rng, n, share):
    """Independent randomisation: 1 (treatment) with probability share."""
    return (rng.random(n) < share).astype(np.int64)


def exposes(exp, t, arm, epoch, starts, ends, every=10.0, phase=(0.0, 0.0),
            delay=None):
    """Exposures pre-counted per arm: a counter flushes one expose line
    with N every `every` seconds, at starts[e] + phase[arm] + k every,
    stamped with its flush time, and once more at the end of its epoch
    (ends[e], just before the next plan). The same phase for both arms is
    one producer counting every arm over the same periods (the README's
    producer contract for pre-counted exposures); different phases are
    counters on different hosts, which the contract excludes. delay:
    optional function (arms of the lines) -> seconds each line is
    delivered after its stamp."""
    if len(t) == 0:
        return []
    epoch = np.asarray(epoch, np.int64)
    st = np.asarray(starts)[epoch - 1]
    en = np.asarray(ends)[epoch - 1]
    ph = np.asarray(phase)[arm]
    k = np.maximum(np.ceil((t - st - ph) / every), 0)
    ts = np.minimum(st + ph + k * every, en - 0.001)
    code = (epoch * (1 << 40) + k.astype(np.int64)) * 2 + arm
    order = np.lexsort((t, code))
    c = code[order]
    first = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    last = np.r_[first[1:], len(c)] - 1
    ts = ts[order][last]
    arms = (c[first] % 2).astype(np.int64)
    key = ts if delay is None else ts + delay(arms)
    return [expose(ts, exp, arms, last - first + 1, key=key)]


def exposes1(exp, t, arm, t0, every=10.0, phase=(0.0, 0.0), delay=None):
    """exposes() of a single-epoch run."""
    return exposes(exp, t, arm, np.ones(len(t), np.int64), [t0],
                   [t[-1] + 2 * every], every, phase, delay)


def segments(rng, sizes, gap_mean):
    """Index of the owner of each of sum(sizes) items and their offsets
    in time: cumulative exponential gaps restarting at each owner."""
    sizes = np.asarray(sizes, np.int64)
    owner = np.repeat(np.arange(len(sizes)), sizes)
    gaps = rng.exponential(gap_mean, len(owner))
    cs = np.cumsum(gaps)
    first = np.r_[0, np.cumsum(sizes)[:-1]]
    base = (cs[first] - gaps[first])[owner]
    return owner, cs - base


def ramp(rng, t0, sizes, rate, shares):
    """Units of a ramp: per epoch `sizes[i]` units at `rate` a second with
    treatment share shares[i]. Returns times, arms, epochs (1-based) and
    the epoch start times."""
    t, a, e, starts = [], [], [], []
    s = t0
    for i, (n, sh) in enumerate(zip(sizes, shares)):
        d = n / rate
        starts.append(s)
        t.append(arrivals(rng, n, s, d))
        a.append(assign(rng, n, sh))
        e.append(np.full(n, i + 1, np.int64))
        s += d
    return (np.concatenate(t), np.concatenate(a), np.concatenate(e),
            starts, s)


def weights(share):
    """Integer plan weights for a treatment share (percent)."""
    w = int(round(100 * share))
    return (100 - w, w)


def plans(exp, starts, shares, late=None):
    late = late or [0.0] * len(starts)
    return [plan(s, s + d, exp, weights(sh))
            for s, sh, d in zip(starts, shares, late)]


def units_of(run, n):
    """Globally unique unit ids: run index * 10^6 + local index."""
    return run * 1_000_000 + np.arange(n, dtype=np.int64)


# ---- the conditions ----
#
# Each generator: gen(rng, exp, run, t0, pos, attrs, **params) -> (parts,
# end). pos plants a clear harm (positive control); otherwise the run is a
# true null.


def g_split_prop(rng, exp, run, t0, pos, attrs, share, n, p, p_pos, rate,
                 metric):
    """Proportion per unit (K of 1) on a lopsided split."""
    t = arrivals(rng, n, t0, n / rate)
    a = assign(rng, n, share)
    pr = np.where(a == 1, p_pos if pos else p, p)
    k = (rng.random(n) < pr).astype(np.int64)
    parts = plans(exp, [t0], [share]) + exposes1(exp, t, a, t0)
    parts.append(count(t, exp, a, metric, k, np.ones(n)))
    return parts, t[-1]


def g_split_mean(rng, exp, run, t0, pos, attrs, share, n, median, sigma,
                 factor_pos, rate):
    """Right-skewed (lognormal) values per unit on a lopsided split: the
    small arm's plug-in variance and mean move together."""
    t = arrivals(rng, n, t0, n / rate)
    a = assign(rng, n, share)
    v = median * rng.lognormal(0, sigma, n)
    if pos:
        v = np.where(a == 1, v * factor_pos, v)
    parts = plans(exp, [t0], [share]) + exposes1(exp, t, a, t0)
    parts.append(observe(t, exp, a, b"basket", v, 2))
    return parts, t[-1]


def g_split_rate(rng, exp, run, t0, pos, attrs, share, n, lam, factor_pos,
                 rate):
    """Rare crashes per session hour (Poisson, lam per hour over
    exponential sessions of 0.3 h) on a lopsided split: the small arm sees
    no event for a long while."""
    t = arrivals(rng, n, t0, n / rate)
    a = assign(rng, n, share)
    hours = np.maximum(np.round(rng.exponential(0.3, n), 4), 0.0001)
    k = rng.poisson(lam * hours * np.where(a == 1, factor_pos if pos else 1,
                                           1))
    parts = plans(exp, [t0], [share]) + exposes1(exp, t, a, t0)
    parts.append(count(t, exp, a, b"crash", k, hours, 4))
    return parts, t[-1]


def _unit_metrics(rng, n, a, better, pos):
    """Latency, errors of requests, crashes over session hours of n
    units. better: treatment factor < 1 on every metric (no harm)."""
    ft = 1.3 if pos else better
    lat = 180 * rng.lognormal(0, 0.5, n) * np.where(a == 1, ft, 1.0)
    req = 1 + rng.poisson(4, n)
    perr = 0.02 * np.where(a == 1, 1.5 if pos else better ** 5, 1.0)
    err = rng.binomial(req, perr)
    hours = np.maximum(np.round(rng.exponential(0.5, n), 4), 0.0001)
    lam = 0.4 * np.where(a == 1, 1.5 if pos else better ** 5, 1.0)
    crash = rng.poisson(lam * hours)
    return lat, req, err, hours, crash


def g_ramp_better(rng, exp, run, t0, pos, attrs, sizes, rate, better):
    """Ramp 10/90 -> 50/50, the treatment better on every metric (latency
    by 1 - better, errors and crashes by 1 - better^5), no drift."""
    shares = (0.10, 0.50)
    t, a, e, starts, end = ramp(rng, t0, sizes, rate, shares)
    lat, req, err, hours, crash = _unit_metrics(rng, len(t), a, better, pos)
    parts = plans(exp, starts, shares) + exposes(exp, t, a, e, starts,
                                                   starts[1:] + [end])
    parts.append(observe(t, exp, a, b"lat", lat, 2))
    parts.append(count(t, exp, a, b"err", err, req))
    parts.append(count(t, exp, a, b"crash", crash, hours, 4))
    return parts, end


RAMP3 = (0.01, 0.10, 0.50)


def g_ramp3_err(rng, exp, run, t0, pos, attrs, sizes, rate, drift):
    """Ramp 1/99 -> 10/90 -> 50/50; each unit's errors K of its N
    requests. drift: the error rate per request climbs from 0.4% to 2%
    over the run in both arms alike (else 1% throughout)."""
    t, a, e, starts, end = ramp(rng, t0, sizes, rate, RAMP3)
    req = 1 + rng.poisson(4, len(t))
    p = 0.01 * (0.4 + 1.6 * (t - t0) / (end - t0)) if drift else \
        np.full(len(t), 0.01)
    if pos:
        p = np.where(a == 1, 2 * p, p)
    err = rng.binomial(req, p)
    parts = plans(exp, starts, RAMP3) + exposes(exp, t, a, e, starts,
                                                   starts[1:] + [end])
    parts.append(count(t, exp, a, b"err", err, req))
    return parts, end


def g_ramp3_late(rng, exp, run, t0, pos, attrs, sizes, rate, lag):
    """Ramp 1/99 -> 10/90 -> 50/50 with latency climbing from 100 to 300
    ms over the run in both arms alike; each unit's latency record is
    stamped (and arrives) about `lag` seconds after its exposure (gamma,
    shape 4), so records cross ramp steps. With attrs the record says the
    epoch its unit was exposed in."""
    t, a, e, starts, end = ramp(rng, t0, sizes, rate, RAMP3)
    ts = t + lag * rng.gamma(4, 0.25, len(t))
    base = 100 + 200 * (ts - t0) / (end - t0)
    v = base * rng.lognormal(0, 0.3, len(t))
    if pos:
        v = np.where(a == 1, 1.15 * v, v)
    parts = plans(exp, starts, RAMP3) + exposes(exp, t, a, e, starts,
                                                   starts[1:] + [end])
    order = np.argsort(ts)
    parts.append(observe(ts[order], exp, a[order], b"lat", v[order], 2,
                         epoch=e[order] if attrs else None))
    return parts, ts.max()


def _flushes(rng, t0, t1, lo, hi):
    """A producer's flush times over [t0, t1 + hi]: gaps uniform in
    [lo, hi], random phase."""
    n = int((t1 - t0) / lo) + 3
    f = t0 + rng.uniform(0, hi) + np.cumsum(rng.uniform(lo, hi, n))
    while f[-1] < t1:
        f = np.r_[f, f[-1] + np.cumsum(rng.uniform(lo, hi, n))]
    return f


def _batched(rng, t, hosts, nhosts, lo, hi, delay):
    """Arrival time of each exposure: the first flush of its host at or
    after its time stamp, plus the host's pipeline delay."""
    arr = np.empty_like(t)
    for h in range(nhosts):
        m = hosts == h
        if not m.any():
            continue
        f = _flushes(rng, t[m].min() - hi, t[m].max(), lo, hi)
        arr[m] = f[np.searchsorted(f, t[m])] + delay[h]
    return arr


def g_srm_batched(rng, exp, run, t0, pos, attrs, n, dur, lo, hi):
    """SRM: one producer per arm (treatment hosts apart from control
    hosts) buffers exposures and flushes every lo..hi seconds (~250 a
    batch at 250/s per arm), time stamps in order, far inside the
    lateness. pos: the real split is 47/53 against a 50/50 plan."""
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.53 if pos else 0.50)
    arr = _batched(rng, t, a, 2, lo, hi, np.zeros(2))
    parts = plans(exp, [t0], [0.5])
    parts.append(expose(t, exp, a, key=arr))
    return parts, arr.max()


def g_srm_producers(rng, exp, run, t0, pos, attrs, n, dur, hosts, lo, hi,
                    lag):
    """SRM: `hosts` producers per arm, each flushing every lo..hi seconds
    on its own clock, the treatment's hosts a further `lag` seconds
    behind (a canary pipeline): records from many producers interleave out
    of order, all within the 30 s lateness."""
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.53 if pos else 0.50)
    host = a * hosts + rng.integers(0, hosts, n)
    delay = np.r_[np.zeros(hosts), np.full(hosts, lag)]
    arr = _batched(rng, t, host, 2 * hosts, lo, hi, delay)
    parts = plans(exp, [t0], [0.5])
    parts.append(expose(t, exp, a, key=arr))
    return parts, arr.max()


def g_srm_ramp(rng, exp, run, t0, pos, attrs, rate, dur, lo, hi,
               plan_late):
    """SRM across a ramp step 10/90 -> 50/50 whose plan record (stamped at
    the step) arrives plan_late seconds after it; exposures arrive in
    per-arm batches, so old-split exposures come after the new plan and
    new-split ones before it."""
    n = int(rate * dur)
    shares = (0.10, 0.50)
    t, a, e, starts, end = ramp(rng, t0, (n, n), rate, shares)
    if pos:
        m = e == 2
        a[m] = assign(rng, int(m.sum()), 0.55)
    arr = _batched(rng, t, a, 2, lo, hi, np.zeros(2))
    parts = plans(exp, starts, shares, late=[0.0, plan_late])
    parts.append(expose(t, exp, a, key=arr))
    return parts, arr.max()


def _users(rng, nusers, t0, dur, gap, reqs_of):
    t_u = arrivals(rng, nusers, t0, dur)
    a_u = assign(rng, nusers, 0.5)
    m = reqs_of(rng, nusers)
    owner, off = segments(rng, m, gap)
    return t_u, a_u, m, owner, t_u[owner] + off


def reqs_poisson(rng, n):
    return 1 + rng.poisson(9, n)


def reqs_whale(rng, n):
    """Requests per user with a Pareto tail (index 1.3): a few users send
    thousands."""
    return np.minimum(1 + np.floor(3 * rng.pareto(1.3, n)), 5000) \
        .astype(np.int64)


def g_clustered(rng, exp, run, t0, pos, attrs, nusers, dur, user_sd,
                req_sd, beta, reqs=reqs_poisson, errors=True):
    """Requests clustered within users (50/50 by user): each request's
    latency is the user's own level (lognormal, user_sd) times request
    noise (req_sd), each request fails with the user's own error rate
    (Beta(beta)). Requests are spread over minutes after the exposure and
    interleave across users. Records name their user with attrs."""
    t_u, a_u, m, owner, t_r = _users(rng, nusers, t0, dur, 30.0, reqs)
    mu = rng.normal(0, user_sd, nusers)
    pu = rng.beta(beta[0], beta[1], nusers)
    a = a_u[owner]
    lat = 150 * np.exp(mu[owner] + rng.normal(0, req_sd, len(owner)))
    p = pu[owner]
    if pos:		# clear harms: liveness, not power
        lat = np.where(a == 1, 4 * lat, lat)
        p = np.where(a == 1, np.minimum(p + 0.05, 1), p)
    err = (rng.random(len(owner)) < p).astype(np.int64)
    o = np.argsort(t_r, kind="stable")
    t_r, a, lat, err, owner = t_r[o], a[o], lat[o], err[o], owner[o]
    unit = units_of(run, nusers)[owner] if attrs else None
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t_u, a_u, t0)
    parts.append(observe(t_r, exp, a, b"lat", lat, 2, unit=unit))
    if errors:
        parts.append(count(t_r, exp, a, b"err", err, np.ones(len(t_r)),
                           unit=unit))
    return parts, t_r[-1]


def g_sessions(rng, exp, run, t0, pos, attrs, nusers, dur, beta):
    """Errors sent per session (K of the session's N requests), ~5
    sessions per user, each user with its own error rate (Beta(beta))."""
    t_u, a_u, m, owner, t_s = _users(
        rng, nusers, t0, dur, 120.0, lambda r, n: 1 + r.poisson(4, n))
    pu = rng.beta(beta[0], beta[1], nusers)
    a = a_u[owner]
    p = pu[owner]
    if pos:		# a clear harm: every request of the arm fails more
        p = np.where(a == 1, np.minimum(p + 0.05, 1), p)
    nreq = 1 + rng.poisson(9, len(owner))
    err = rng.binomial(nreq, p)
    o = np.argsort(t_s, kind="stable")
    unit = units_of(run, nusers)[owner[o]] if attrs else None
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t_u, a_u, t0)
    parts.append(count(t_s[o], exp, a[o], b"err", err[o], nreq[o],
                       unit=unit))
    return parts, t_s.max()


def g_crash_sessions(rng, exp, run, t0, pos, attrs, n, dur, shape):
    """Crashes per session hour, one record per session, overdispersed:
    K ~ Poisson(0.5 H G) with G ~ Gamma(shape, 1/shape) per session (a
    negative binomial; small shape = crash loops)."""
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.5)
    hours = np.maximum(np.round(0.2 * rng.lognormal(0, 0.8, n), 4), 0.0001)
    g = rng.gamma(shape, 1 / shape, n)
    lam = 0.5 * np.where(a == 1, 2.0 if pos else 1.0, 1.0)
    k = rng.poisson(lam * hours * g)
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0)
    parts.append(count(t, exp, a, b"crash", k, hours, 4))
    return parts, t[-1]


def g_crash_devices(rng, exp, run, t0, pos, attrs, ndev, dur, shape):
    """Crashes per session hour from devices with ~5 sessions each; each
    device has its own crash proneness (Gamma(shape, 1/shape)), each
    session its own as well (Gamma(1, 1)): crash loops stay with a
    device. Records name their device with attrs."""
    t_u, a_u, m, owner, t_s = _users(
        rng, ndev, t0, dur, 120.0, lambda r, n: 1 + r.poisson(4, n))
    gd = rng.gamma(shape, 1 / shape, ndev)
    a = a_u[owner]
    ns = len(owner)
    hours = np.maximum(np.round(0.2 * rng.lognormal(0, 0.8, ns), 4), 0.0001)
    lam = 0.5 * np.where(a == 1, 2.0 if pos else 1.0, 1.0)
    k = rng.poisson(lam * hours * gd[owner] * rng.gamma(1, 1, ns))
    o = np.argsort(t_s, kind="stable")
    unit = units_of(run, ndev)[owner[o]] if attrs else None
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t_u, a_u, t0)
    parts.append(count(t_s[o], exp, a[o], b"crash", k[o], hours[o], 4,
                       unit=unit))
    return parts, t_s.max()


def g_p50_grid(rng, exp, run, t0, pos, attrs, n, dur, shift, shift_pos):
    """Latency on a 10 ms grid; the treatment is the control's
    distribution moved by exactly `shift` ms (the margin)."""
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.5)
    v = np.maximum(10 * np.rint(120 * rng.lognormal(0, 0.35, n) / 10), 10)
    v = v + np.where(a == 1, shift_pos if pos else shift, 0)
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0)
    parts.append(observe(t, exp, a, b"lat", v, 0))
    return parts, t[-1]


def g_srm_counters(rng, exp, run, t0, pos, attrs, rate, dur, every, late):
    """SRM: exposures pre-counted per arm (expose N) over the same
    `every`-second periods for both arms (the README's producer contract),
    but each arm's counter on its own host: its lines are delivered up to
    `late` seconds after their stamps (a fixed lag per arm and run, plus
    jitter), inside the lateness. A counter line's N units all carry its
    one stamp."""
    n = int(rate * dur)
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.53 if pos else 0.50)
    ph = rng.uniform(0, every)
    lag = rng.uniform(0, late - 3, 2)

    def delay(arms):
        return lag[arms] + rng.uniform(0, 3, len(arms))
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0, every,
                                               (ph, ph), delay)
    return parts, t[-1] + 2 * every + late


def g_lagged_arm(rng, exp, run, t0, pos, attrs, n, dur, lag):
    """A cold start: latency falls from ~400 to ~100 ms over the first
    minutes (time constant 180 s) in both arms alike, each record stamped
    with its measurement time; the treatment's records are delivered `lag`
    seconds (+ up to 2 s) behind the control's, inside the lateness. At
    any moment the control's tally holds later, faster requests than the
    treatment's: only data complete for both arms compares like with
    like."""
    t = arrivals(rng, n, t0, dur)
    a = assign(rng, n, 0.5)
    v = (100 + 300 * np.exp(-(t - t0) / 180)) * rng.lognormal(0, 0.3, n)
    if pos:
        v = np.where(a == 1, 1.5 * v, v)
    arr = t + np.where(a == 1, lag + rng.uniform(0, 2, n), 0)
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0)
    parts.append(observe(t, exp, a, b"lat", v, 2, key=arr))
    return parts, arr.max()


def g_short_epochs(rng, exp, run, t0, pos, attrs, epochs, size, rate):
    """Many short epochs (the split switches 50/50 <-> 40/60 with every
    step) of right-skewed values (lognormal sigma 1): each epoch restarts
    on a few hundred units, where plug-in variances are poorest."""
    shares = [0.5 if i % 2 == 0 else 0.4 for i in range(epochs)]
    t, a, e, starts, end = ramp(rng, t0, [size] * epochs, rate, shares)
    v = 200 * rng.lognormal(0, 1.0, len(t))
    if pos:
        v = np.where(a == 1, 1.3 * v, v)
    parts = [plan(s, s, exp, (100 - int(100 * sh), int(100 * sh)))
             for s, sh in zip(starts, shares)]
    parts += exposes(exp, t, a, e, starts,
                                                   starts[1:] + [end])
    parts.append(observe(t, exp, a, b"lat", v, 2))
    return parts, end


def g_margin_edge(rng, exp, run, t0, pos, attrs, n, rate):
    """Every kind with a relative margin and the true effect exactly at
    it: mean x1.03 (margin 3%), p99 x1.05 (5%), error proportion 5% vs
    5.5% (10%), crash rate 0.5/h vs 0.55/h (10%)."""
    t = arrivals(rng, n, t0, n / rate)
    a = assign(rng, n, 0.5)
    trt = a == 1
    m = 200 * rng.lognormal(0, 0.5, n) * np.where(trt, 1.15 if pos else 1.03,
                                                  1)
    q = 200 * rng.lognormal(0, 0.5, n) * np.where(trt, 1.35 if pos else 1.05,
                                                  1)
    err = (rng.random(n) < np.where(trt, 0.08 if pos else 0.055, 0.05)) \
        .astype(np.int64)
    hours = np.maximum(np.round(rng.exponential(0.5, n), 4), 0.0001)
    k = rng.poisson(0.5 * hours * np.where(trt, 1.6 if pos else 1.1, 1))
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0)
    parts.append(observe(t, exp, a, b"e_mean", m, 2))
    parts.append(observe(t, exp, a, b"e_p99", q, 2))
    parts.append(count(t, exp, a, b"e_err", err, np.ones(n)))
    parts.append(count(t, exp, a, b"e_crash", k, hours, 4))
    return parts, t[-1]


# ---- power: 50/50, one unit every 1/rate s, one record per kind ----

POWER_LEVEL = 0.0125
POWER_N = 10000			# planned units per arm = fixed-horizon n


def power_effects():
    """Planted effects at which the one-look, one-sided fixed-horizon test
    at POWER_LEVEL has 80% power with POWER_N units per arm (normal
    approximations; z quantiles from scipy.stats.norm; sample-size
    formulas of Chow, Shao & Wang 2008, ch. 3-4, from memory)."""
    from scipy.stats import norm
    from scipy.optimize import brentq
    za, zb = norm.ppf(1 - POWER_LEVEL), norm.ppf(0.8)
    n = POWER_N
    eff = {}
    # mean: normal, sigma 20
    eff["mean"] = dict(mu=200.0, sigma=20.0,
                       delta=(za + zb) * 20.0 * np.sqrt(2.0 / n))
    # proportion: p0 = 5%, pooled variance under H0, unpooled under H1

    def n_prop(d, p0=0.05):
        p1 = p0 + d
        pb = (p0 + p1) / 2
        return (za * np.sqrt(2 * pb * (1 - pb)) +
                zb * np.sqrt(p0 * (1 - p0) + p1 * (1 - p1))) ** 2 / d ** 2
    eff["proportion"] = dict(p0=0.05, delta=brentq(
        lambda d: n_prop(d) - n, 1e-5, 0.5))
    # rate: Poisson counts over 1 hour per unit, lambda0 = 0.5 / h

    def n_rate(d, l0=0.5):
        l1 = l0 + d
        return (za * np.sqrt(2 * (l0 + l1) / 2) +
                zb * np.sqrt(l0 + l1)) ** 2 / d ** 2
    eff["rate"] = dict(lam0=0.5, delta=brentq(
        lambda d: n_rate(d) - n, 1e-5, 5))
    # p99 of lognormal(log 200, 0.5), treatment scaled by 1 + r: the
    # sample quantile's variance q(1-q)/(n f(x_q)^2) per arm
    q, s = 0.99, 0.5
    zq = norm.ppf(q)
    fx = norm.pdf(zq) / s		# f(x_q) x_q of the lognormal

    def n_q(r):
        return (za + zb) ** 2 * q * (1 - q) * (1 + (1 + r) ** 2) / \
            (fx ** 2 * r ** 2)
    r = brentq(lambda r: n_q(r) - n, 1e-4, 5)
    eff["quantile"] = dict(median=200.0, sigma=s, q=q, rel=r, zq=zq,
                           sf_trt=norm.sf(zq - np.log1p(r) / s))
    return eff


POWER_RATE = 100.0		# units a second


def g_power(rng, exp, run, t0, pos, attrs, eff, horizon):
    """One unit every 1/POWER_RATE s, 50/50, each unit one record per
    kind, the treatment harmed by the planted effects. Returns also each
    kind's Wald SPRT stopping size (units; inf when never), a lower
    bound: the log likelihood ratio of the difference of means at the true
    effect with known variances (normal approximation; for the quantile,
    of the shares above the control's true p99), stopped at
    log(1/level) (Wald 1945, one boundary)."""
    n = horizon
    t = t0 + np.arange(1, n + 1) / POWER_RATE
    a = assign(rng, n, 0.5)
    trt = a == 1
    e = eff["mean"]
    mv = rng.normal(e["mu"], e["sigma"], n) + np.where(trt, e["delta"], 0)
    e = eff["proportion"]
    pp = np.where(trt, e["p0"] + e["delta"], e["p0"])
    pk = (rng.random(n) < pp).astype(np.int64)
    e = eff["rate"]
    rk = rng.poisson(np.where(trt, e["lam0"] + e["delta"], e["lam0"]))
    e = eff["quantile"]
    qlog = np.log(e["median"]) + rng.normal(0, e["sigma"], n) + \
        np.where(trt, np.log1p(e["rel"]), 0)
    qv = np.exp(qlog)
    if mv.min() <= 0:
        raise ValueError("power mean values must stay positive")
    parts = plans(exp, [t0], [0.5]) + exposes1(exp, t, a, t0)
    parts.append(observe(t, exp, a, b"pw_mean", mv, 3))
    parts.append(count(t, exp, a, b"pw_prop", pk, np.ones(n)))
    parts.append(count(t, exp, a, b"pw_rate", rk, np.ones(n)))
    parts.append(observe(t, exp, a, b"pw_q", qv, 3))
    thr = np.log(1 / POWER_LEVEL)
    p0, p1 = eff["proportion"]["p0"], eff["proportion"]["p0"] + \
        eff["proportion"]["delta"]
    l0, l1 = eff["rate"]["lam0"], eff["rate"]["lam0"] + eff["rate"]["delta"]
    # the quantile's SPRT sees what a p99 test sees: exceedances of the
    # control's true p99 (Bernoulli 1% against the treatment's share)
    e = eff["quantile"]
    xq = np.log(e["median"]) + e["sigma"] * e["zq"]
    pq0 = 1 - e["q"]
    pq1 = e["sf_trt"]
    sprt = {
        "mean": _sprt(mv, trt, eff["mean"]["delta"],
                      eff["mean"]["sigma"] ** 2, eff["mean"]["sigma"] ** 2,
                      thr),
        "proportion": _sprt(pk, trt, p1 - p0, p0 * (1 - p0), p1 * (1 - p1),
                            thr),
        "rate": _sprt(rk, trt, l1 - l0, l0, l1, thr),
        "quantile": _sprt(qlog > xq, trt, pq1 - pq0, pq0 * (1 - pq0),
                          pq1 * (1 - pq1), thr),
    }
    return parts, t[-1], sprt


def _sprt(x, trt, delta, vc, vt, thr):
    nt = np.cumsum(trt)
    nc = np.cumsum(~trt)
    st = np.cumsum(np.where(trt, x, 0.0))
    sc = np.cumsum(np.where(trt, 0.0, x))
    ok = (nt > 0) & (nc > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = st / nt - sc / nc
        v = vt / nt + vc / nc
        llr = np.where(ok, delta * z / v - delta ** 2 / (2 * v), -np.inf)
    hit = np.flatnonzero(llr >= thr)
    return float(hit[0] + 1) if hit.size else float("inf")


def runs_stream(gen, params, runs, pos_runs, seed, attrs, write, block=8,
                pos_params=None):
    """Write `runs` null and `pos_runs` positive runs of one condition,
    `block` at a time sharing record time (concurrent experiments), the
    blocks one after another. Null runs are "nNNNNN", positive ones
    "pNNNNN"; their order is shuffled. pos_params overrides params in
    positive runs (a longer run, where a harm needs more data to show).
    Returns per run id the start time and any extra the generator
    returned (power: SPRT sizes)."""
    order = [(b"n", i) for i in range(runs)] + \
        [(b"p", i) for i in range(pos_runs)]
    rng0 = np.random.default_rng([seed, 7])
    order = [order[i] for i in rng0.permutation(len(order))]
    info = {}
    base = T0
    for b0 in range(0, len(order), block):
        parts, end = [], base
        for kind, i in order[b0:b0 + block]:
            run = (1 if kind == b"p" else 0) * 500000 + i
            rng = np.random.default_rng([seed, run])
            exp = b"%s%05d" % (kind, i)
            t0 = base + rng.uniform(0, 30)
            kw = dict(params, **(pos_params or {})) if kind == b"p" \
                else params
            out = gen(rng, exp, run, t0, kind == b"p", attrs, **kw)
            p, e = out[0], out[1]
            info[exp.decode()] = (t0,) + tuple(out[2:])
            parts += p
            end = max(end, e)
        write(assemble(parts))
        base = np.ceil(end) + 120
    return info
