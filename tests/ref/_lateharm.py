"""Late harm, generated outside the engine: helper of test_lateharm.py.

A stream holds many runs of one scenario, each run its own experiment id
(r0000, r0001, ...), all on one clock of record time: 100 units a second
per run (RATE), each unit one record, its arm drawn 50/50. After
`healthy` units per run the treatment turns harmful:

  proportion  count records "K of N" requests, N = 1 + Poisson(9),
              K ~ Binomial(N, p); errors p = 1% -> 2% in the treatment
  rate        count records "K over N" hours of a session, N ~
              Exponential(mean 0.5 h), K ~ Poisson(lambda N); crashes
              lambda = 0.2 -> 0.4 per hour in the treatment
  mean        observe records, Normal(100, 100); +0.3 sd in the treatment
  quantile    observe records, lognormal (median 100, sigma 0.5); every
              treatment value x 1.2 (so its p99 grows by 20%)

Data are drawn per chunk of CHUNK units (all runs at once) from a seed of
(seed, kind, chunk position relative to the change): two streams with a
different healthy history share their last healthy chunks and their whole
harmful phase, so delays after 20k and after 200k healthy units are
compared on the same harmful data (common random numbers).

The generator also keeps, per run and block of BLOCK units (1 s), each
arm's sufficient statistics, from which two references are computed with
numpy and nothing from stopcock:
  - the oracle: a one-sided normal-mixture sequential test (Robbins 1970's
    mixture of likelihood ratios, a half-normal prior on the excess, its
    scale the true excess) started at the change, at the guardrail's level;
  - Page's CUSUM (Page 1954) of the Gaussian block scores at the true
    excess, run from the first block with the engine's threshold log c.
Both know the model: the true excess and the variance of the block
scores under no excess (at the margin's boundary), which the engine has
to estimate.
A block's score is X = d / V and its information I = 1 / V, where d is
the treatment's excess beyond the margin in the block (treatment minus
(1 + margin) x control) and V its variance; the Gaussian log likelihood
ratio of excess lam against 0 is lam X - lam^2 I / 2.

Lines are built as fixed-width byte columns with numpy (no Python loop
per record); runs already decided stop sending records, so a stream costs
what each replay's undecided runs need.
"""
import json
import math
import os
import queue
import re
import subprocess
import threading

import numpy as np

T0 = 1700000000		# record time of the first unit (unix seconds)
RATE = 100		# units per second of record time, per run
BLOCK = RATE		# units per reference block: 1 s
CHUNK = 2000		# units per run generated at once (20 s)
POST = 200000		# units after the change a run is watched
MAX_RUNS = 10000	# run ids have four digits

KINDS = ("proportion", "rate", "mean", "quantile")
KIND_ID = {k: i for i, k in enumerate(KINDS)}

P_ERR, P_ERR_BAD = 0.01, 0.02		# proportion: errors 1% -> 2%
REQS_EXTRA = 9				# requests per unit: 1 + Poisson(9)
CRASH, CRASH_BAD = 0.2, 0.4		# rate: crashes per hour
SESSION_H = 0.5				# mean session length, hours
MEAN_MU, MEAN_SD, MEAN_SHIFT = 100.0, 100.0, 0.3	# shift in sd
Q_MEDIAN, Q_SIGMA, Q_SCALE = 100.0, 0.5, 1.2
QUANTILE = 0.99


def norm_sf(x):
    """Upper tail of the standard normal, via math.erfc."""
    return 0.5 * math.erfc(x / math.sqrt(2.0))


def norm_isf(p):
    """z with norm_sf(z) = p, by bisection on math.erfc (no scipy)."""
    lo, hi = -40.0, 40.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if norm_sf(mid) > p:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


Z99 = norm_isf(1 - QUANTILE)
Q_CTL = Q_MEDIAN * math.exp(Q_SIGMA * Z99)	# the control's true p99


def config_text(kind, margin, runs):
    """One guardrail, so the experiment's family is one (two arms)."""
    g = {"proportion": "metric = errors\ntest = proportion\n",
         "rate": "metric = crashes\ntest = rate\n",
         "mean": "metric = render_ms\ntest = mean\n",
         "quantile": "metric = latency_ms\ntest = quantile\n"
                     "quantile = %g\n" % QUANTILE}[kind]
    return ("[defaults]\nalpha = 0.05\nmax_experiments = %d\n\n"
            "[guardrail late]\n%sharm = increase\nmargin = %s\n"
            % (max(runs + 10, 100), g,
               "0" if margin == 0 else "%g%%" % (100 * margin)))


def true_excess(kind, margin, harmful):
    """The treatment's excess beyond the margin (treatment minus (1 +
    margin) x control, in the metric's units; for quantiles in shares
    above the control's p99) before (harmful false) or after the change."""
    k = 1 + margin
    if kind == "proportion":
        pt = P_ERR_BAD if harmful else P_ERR
        return pt - k * P_ERR
    if kind == "rate":
        lt = CRASH_BAD if harmful else CRASH
        return lt - k * CRASH
    if kind == "mean":
        mt = MEAN_MU + (MEAN_SHIFT * MEAN_SD if harmful else 0)
        return mt - k * MEAN_MU
    # quantile: the treatment's share above (1 + margin) x the control's
    # p99, against the control's share above its own p99 (1 - QUANTILE)
    return exceed_share(harmful, k) - (1 - QUANTILE)


def exceed_share(harmful, k):
    """P(treatment value > k x the control's true p99)."""
    scale = Q_SCALE if harmful else 1.0
    return norm_sf(Z99 + math.log(k / scale) / Q_SIGMA)


# ---------------------------------------------------------------- lines

def _digits_into(out, x, width):
    """Write non-negative integers x (any shape) as width ASCII digits,
    zero padded, into out (shape x.shape + (width,))."""
    if x.size and (x.min() < 0 or x.max() >= 10 ** width):
        raise ValueError("value does not fit %d digits" % width)
    x = x.astype(np.int64)
    for j in range(width - 1, -1, -1):
        x, d = np.divmod(x, 10)
        out[..., j] = d + 48


def _width(x):
    m = int(np.max(x)) if np.size(x) else 0
    return max(1, len(str(m)))


class _Row:
    """A (units, runs, width) byte matrix filled column by column."""

    def __init__(self, units, runs, width):
        self.a = np.empty((units, runs, width), dtype=np.uint8)
        self.at = 0

    def text(self, s):
        b = np.frombuffer(s.encode(), dtype=np.uint8)
        self.a[:, :, self.at:self.at + b.size] = b
        self.at += b.size

    def digits(self, x, width):
        """x: (units, runs), (units, 1) or (1, runs)."""
        tmp = np.empty(x.shape + (width,), dtype=np.uint8)
        _digits_into(tmp, x, width)
        self.a[:, :, self.at:self.at + width] = tmp
        self.at += width

    def fixed(self, x, decimals):
        """Non-negative fixed point (value x 10^decimals) as INT.FRAC."""
        ip, fp = np.divmod(x, 10 ** decimals)
        self.digits(ip, _width(ip))
        self.text(".")
        self.digits(fp, decimals)


def build_lines(first_unit, units, runs_idx, arm, fields, record, metric):
    """Lines of one chunk as a (units, len(runs_idx), width) byte array:
    unit i of every selected run, runs fastest once flattened. arm,
    fields: (units, runs) arrays; runs_idx: the selected columns. Fields
    are fixed-width within a chunk (numbers zero padded)."""
    n_r = runs_idx.size
    if n_r == 0:
        return np.zeros((units, 0, 1), dtype=np.uint8)
    sel = (slice(None), runs_idx)
    u = np.arange(first_unit, first_unit + units, dtype=np.int64)[:, None]
    if record == "count":
        k, nn, dec = fields
        k = k[sel]
        nn = nn[sel]
        wk = _width(k)
        wn = _width(nn) if dec == 0 else _width(nn // 10 ** dec) + 1 + dec
        vw = wk + 1 + wn
    else:
        (v,) = fields
        v = v[sel]
        av = np.abs(v)
        vw = 1 + _width(av // 1000) + 4
    head = "@" + "0" * 10 + ".00 " + record + " r"
    tail = " ctl " + metric + " "
    width = len(head) + 4 + len(tail) + vw + 1
    row = _Row(units, n_r, width)
    row.text("@")
    row.digits(T0 + u // RATE, 10)
    row.text(".")
    row.digits(u % RATE, 2)
    row.text(" %s r" % record)
    row.digits(runs_idx[None, :], 4)
    row.text(" ")
    names = np.array([list(b"ctl"), list(b"trt")], dtype=np.uint8)
    row.a[:, :, row.at:row.at + 3] = names[arm[sel].astype(np.int64)]
    row.at += 3
    row.text(" %s " % metric)
    if record == "count":
        row.digits(k, wk)
        row.text(" ")
        if dec == 0:
            row.digits(nn, wn)
        else:
            row.fixed(nn, dec)
    else:
        sign = np.where(v < 0, ord("-"), ord("+")).astype(np.uint8)
        row.a[:, :, row.at] = sign
        row.at += 1
        row.fixed(av, 3)
    row.text("\n")
    assert row.at == width
    return row.a


def header_lines(runs):
    return "".join("@%d.00 plan r%04d ctl=50 trt=50\n" % (T0, r)
                   for r in range(runs)).encode()


# ------------------------------------------------------------ the data

METRIC = {"proportion": "errors", "rate": "crashes", "mean": "render_ms",
          "quantile": "latency_ms"}


def draw_chunk(kind, seed, pos, runs, harmful_from):
    """One chunk of CHUNK units x runs. pos: the chunk's position relative
    to the change (0 = the first harmful chunk). harmful_from: first unit
    (within the chunk) that is harmful, 0..CHUNK. Returns (arm, line
    fields, num, den, extra): per unit the arm (True: treatment), what
    its line carries, and what block_stats sums (for quantiles num is the
    exceedance of the control's p99 and extra the value itself)."""
    ss = np.random.SeedSequence([seed, KIND_ID[kind], pos + (1 << 30)])
    rng = np.random.default_rng(ss)
    shape = (CHUNK, runs)
    arm = rng.random(shape) < 0.5		# True: treatment
    bad = np.zeros(shape, dtype=bool)
    bad[harmful_from:, :] = True
    bad &= arm
    if kind == "proportion":
        n = 1 + rng.poisson(REQS_EXTRA, shape)
        k = rng.binomial(n, np.where(bad, P_ERR_BAD, P_ERR))
        fields, num, den = (k, n, 0), k, n
        extra = None
    elif kind == "rate":
        hours_u = np.maximum(1, np.rint(rng.exponential(SESSION_H, shape) *
                                        1e6)).astype(np.int64)
        hours = hours_u / 1e6
        k = rng.poisson(np.where(bad, CRASH_BAD, CRASH) * hours)
        fields, num, den = (k, hours_u, 6), k, hours
        extra = None
    elif kind == "mean":
        v = rng.normal(MEAN_MU, MEAN_SD, shape)
        v = v + np.where(bad, MEAN_SHIFT * MEAN_SD, 0.0)
        vm = np.rint(v * 1000).astype(np.int64)
        fields, num, den = (vm,), vm / 1000.0, np.ones(shape)
        extra = None
    else:
        v = Q_MEDIAN * np.exp(Q_SIGMA * rng.standard_normal(shape))
        v = v * np.where(bad, Q_SCALE, 1.0)
        vm = np.maximum(1, np.rint(v * 1000)).astype(np.int64)
        fields = (vm,)
        x = vm / 1000.0
        num, den = (x > Q_CTL).astype(float), np.ones(shape)
        extra = x		# exceedances at k x p99 are taken per margin
    return arm, fields, num, den, extra


def block_stats(arm, num, den, extra, margins):
    """Per block (BLOCK units) and arm: units, sum num, sum den, and for
    quantiles the treatment's exceedances above (1 + m) p99 per margin."""
    nb = CHUNK // BLOCK
    r = arm.shape[1]

    def per(x, a):
        return (x * a).reshape(nb, BLOCK, r).sum(axis=1)
    out = {}
    for side, a in (("c", ~arm), ("t", arm)):
        af = a.astype(float)
        out["n" + side] = per(np.ones_like(af), af)
        out["num" + side] = per(num, af)
        out["den" + side] = per(den, af)
    if extra is not None:
        for m in margins:
            out["exc%g" % m] = per((extra > (1 + m) * Q_CTL).astype(float),
                                   arm.astype(float))
    return out


# ---------------------------------------------------------- references

def block_scores(kind, margin, st):
    """X, I per block (arrays of shape (blocks, runs)) from the block
    statistics. V is the block's variance under "no excess", at the
    margin's boundary (treatment = (1 + margin) x the true control): the
    variance that makes lam X - lam^2 I / 2 a log likelihood ratio whose
    exponential is a supermartingale while there is no harm, so both
    references keep their guarantee as the engine's evidence does."""
    k = 1 + margin
    nc, nt = st["nc"], st["nt"]
    denc, dent = st["denc"], st["dent"]
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "proportion":
            p0 = k * P_ERR
            d = st["numt"] / dent - k * st["numc"] / denc
            V = p0 * (1 - p0) / dent + k * k * P_ERR * (1 - P_ERR) / denc
        elif kind == "rate":
            d = st["numt"] / dent - k * st["numc"] / denc
            V = k * CRASH / dent + k * k * CRASH / denc
        elif kind == "mean":
            d = st["numt"] / nt - k * st["numc"] / nc
            V = MEAN_SD ** 2 / nt + k * k * MEAN_SD ** 2 / nc
        else:
            # at the boundary the treatment's share above (1 + margin) x
            # the control's p99 is 1 - QUANTILE, as the control's above
            # its own
            pc = 1 - QUANTILE
            d = st["exc%g" % margin] / nt - st["numc"] / nc
            V = pc * (1 - pc) / nt + pc * (1 - pc) / nc
    good = np.isfinite(d) & np.isfinite(V) & (V > 0)
    X = np.where(good, d / np.where(good, V, 1), 0.0)
    I = np.where(good, 1 / np.where(good, V, 1), 0.0)
    return X, I


def _log_phi(x):
    """log of the standard normal cdf, elementwise, via math.erfc."""
    f = np.frompyfunc(lambda v: math.log(max(0.5 * math.erfc(-v /
                                             math.sqrt(2.0)), 1e-300)), 1, 1)
    return f(x).astype(float)


class Reference:
    """Oracle and CUSUM of one margin over a stream, fed block by block.
    Keeps the CUSUM's largest value before the change, and after it the
    CUSUM's and the oracle's paths (one number per run and block)."""

    def __init__(self, kind, margin, runs, healthy):
        self.kind, self.margin, self.healthy = kind, margin, healthy
        self.lam = true_excess(kind, margin, True)
        self.W = np.full(runs, -np.inf)		# log CUSUM, none yet
        self.pre_max = np.full(runs, -np.inf)
        self.S = np.zeros(runs)
        self.I = np.zeros(runs)
        self.cusum_path = []
        self.oracle_path = []
        self.block = 0

    def feed(self, st, first_block_harmful):
        nb = st["nc"].shape[0]
        X, I = block_scores(self.kind, self.margin, st)
        lam = self.lam
        tau2 = lam * lam
        for b in range(nb):
            lr = lam * X[b] - 0.5 * lam * lam * I[b]
            self.W = lr + np.maximum(self.W, 0.0)	# Page 1954
            if b < first_block_harmful:
                self.pre_max = np.maximum(self.pre_max, self.W)
                continue
            self.S += X[b]
            self.I += I[b]
            self.cusum_path.append(self.W.copy())
            # half-normal mixture of exp(t S - t^2 I / 2), t >= 0, prior
            # sd tau: log 2 - log(1 + tau^2 I) / 2 + S^2 / (2 a) + log
            # Phi(S / sqrt a), a = I + 1 / tau^2 (Robbins 1970's mixture)
            a = self.I + 1 / tau2
            self.oracle_path.append(
                math.log(2) - 0.5 * np.log1p(tau2 * self.I) +
                self.S ** 2 / (2 * a) + _log_phi(self.S / np.sqrt(a)))
        self.block += nb

    def delays(self, log_c, level):
        """Units after the change until each reference alarms (inf when
        it did not within the data), and the CUSUM's false alarms before
        the change at log c."""
        def first(path, thr):
            if not path:
                return np.full(self.W.size, np.inf)
            p = np.array(path)
            hit = p >= thr
            idx = np.where(hit.any(axis=0), hit.argmax(axis=0), -1)
            return np.where(idx >= 0, (idx + 1.0) * BLOCK, np.inf)
        return (first(self.oracle_path, math.log(1 / level)),
                first(self.cusum_path, log_c),
                self.pre_max >= log_c)

    def decided(self, log_c, level):
        o, c, _ = self.delays(log_c, level)
        return np.isfinite(o) & np.isfinite(c)


# ------------------------------------------------------------ replays

class Replay:
    """`stopcock replay` on a pipe: a writer thread feeds its stdin, a
    reader thread parses its verdict lines as they come (stdout made line
    buffered by stdbuf, so a run's harm is known soon after it is found).
    """

    def __init__(self, stopcock, conf, errpath):
        argv = [stopcock, "replay", "-q", "-c", conf, "-"]
        if os.path.exists("/usr/bin/stdbuf"):
            argv = ["/usr/bin/stdbuf", "-oL"] + argv
        self.err = open(errpath, "w+")
        self.p = subprocess.Popen(argv, stdin=subprocess.PIPE,
                                  stdout=subprocess.PIPE, stderr=self.err,
                                  bufsize=0)
        self.q = queue.Queue(maxsize=2)
        self.lock = threading.Lock()
        self.harm = {}		# run -> first harm line (parsed)
        self.safe = {}		# run -> first safe line's ts
        self.lines = 0
        self.write_error = None
        self.w = threading.Thread(target=self._write, daemon=True)
        self.r = threading.Thread(target=self._read, daemon=True)
        self.w.start()
        self.r.start()

    def _write(self):
        try:
            while True:
                b = self.q.get()
                if b is None:
                    break
                self.p.stdin.write(b)
        except (BrokenPipeError, OSError) as e:
            self.write_error = e
        finally:
            try:
                self.p.stdin.close()
            except OSError:
                pass

    def _read(self):
        for raw in self.p.stdout:
            f = json.loads(raw)
            if f.get("kind") != "verdict":
                continue
            run = int(f["experiment"][1:])
            with self.lock:
                self.lines += 1
                if f["verdict"] == "harm" and run not in self.harm:
                    self.harm[run] = f
                elif f["verdict"] == "safe" and run not in self.safe:
                    self.safe[run] = f["ts"]

    def send(self, b):
        self.q.put(b)

    def harmed(self):
        with self.lock:
            return set(self.harm)

    def thresholds(self):
        """Detector thresholds (log c) the harm lines so far reported."""
        with self.lock:
            return [f["detector"]["threshold"] for f in self.harm.values()
                    if isinstance(f.get("detector"), dict) and
                    f["detector"].get("threshold") is not None]

    def finish(self):
        self.q.put(None)
        self.w.join()
        self.r.join()
        rc = self.p.wait()
        self.err.seek(0)
        err = self.err.read()
        self.err.close()
        return rc, err


def summary_counts(err):
    """(records applied, rejected) from replay's summary on stderr."""
    m = re.search(r"(\d+) records applied, (\d+) rejected", err)
    return (int(m.group(1)), int(m.group(2))) if m else (None, None)


FALLBACK_LOG_C = math.log(20 * 30 * 86400 / 0.05)


def run_cell(stopcock, kind, healthy, runs, seed, margins, tmpdir,
             post=POST):
    """Generate one stream (kind, healthy history), replay it once per
    margin, and measure. Returns one result dict per margin."""
    if healthy % CHUNK or runs > MAX_RUNS:
        raise ValueError("healthy must be a multiple of %d" % CHUNK)
    reps, refs = [], []
    for m in margins:
        conf = os.path.join(tmpdir, "%s-%g.conf" % (kind, m))
        with open(conf, "w") as fp:
            fp.write(config_text(kind, m, runs))
        reps.append(Replay(stopcock, conf, os.path.join(
            tmpdir, "%s-%d-%g.err" % (kind, healthy, m))))
        refs.append(Reference(kind, m, runs, healthy))
    record = "observe" if kind in ("mean", "quantile") else "count"
    head = header_lines(runs)
    for rp in reps:
        rp.send(head)
    total = healthy + post
    sent = [runs] * len(reps)	# records sent to each replay, plans first
    for c0 in range(0, total, CHUNK):
        pos = (c0 - healthy) // CHUNK
        harm_from = min(CHUNK, max(0, healthy - c0))
        arm, fields, num, den, extra = draw_chunk(kind, seed, pos, runs,
                                                  harm_from)
        st = block_stats(arm, num, den, extra, margins)
        for ref in refs:
            ref.feed(st, harm_from // BLOCK)
        # a replay needs a run's records until it raised harm for it
        # (harm is final in an epoch: later records change nothing); the
        # references need the data until they alarm, not the lines
        want = np.ones((len(reps), runs), dtype=bool)
        if c0 >= healthy:
            for i, rp in enumerate(reps):
                want[i, list(rp.harmed())] = False
            log_c = max([FALLBACK_LOG_C] + [x for rp in reps
                                            for x in rp.thresholds()])
            undecided = [~ref.decided(log_c, 0.05) for ref in refs]
            if not want.any() and not np.any(undecided):
                break
        union = np.nonzero(want.any(axis=0))[0]
        if union.size == 0:
            continue
        rows = build_lines(c0, CHUNK, union, arm, fields, record,
                           METRIC[kind])
        for i, rp in enumerate(reps):
            cols = np.nonzero(want[i, union])[0]
            if cols.size == 0:
                continue
            b = (rows if cols.size == union.size else
                 rows[:, cols, :]).tobytes()
            sent[i] += cols.size * CHUNK
            rp.send(b)
    out = []
    for i, (m, rp, ref) in enumerate(zip(margins, reps, refs)):
        rc, err = rp.finish()
        applied, rejected = summary_counts(err)
        out.append(measure(kind, healthy, m, runs, rp, ref, rc, err,
                           applied, rejected, sent[i]))
    return out


def measure(kind, healthy, margin, runs, rp, ref, rc, err, applied,
            rejected, sent):
    change_ts = T0 + healthy / RATE
    delay = np.full(runs, np.inf)
    false_alarm = np.zeros(runs, dtype=bool)
    safe_before = np.zeros(runs, dtype=bool)
    by_detector = np.zeros(runs, dtype=bool)
    thresholds, levels = set(), set()
    for run, f in rp.harm.items():
        unit = int(round((f["ts"] - T0) * RATE))
        if f["ts"] < change_ts:
            false_alarm[run] = True
        elif unit + 1 - healthy <= POST:
            delay[run] = unit + 1 - healthy
        by_detector[run] = f.get("raised_by") == "change_detector"
        det = f.get("detector")
        if isinstance(det, dict) and det.get("threshold") is not None:
            thresholds.add(round(det["threshold"], 9))
        if f.get("alpha") is not None:
            levels.add(f["alpha"])
    for run, ts in rp.safe.items():
        if ts < change_ts:
            safe_before[run] = True
    log_c = max(thresholds) if thresholds else FALLBACK_LOG_C
    level = min(levels) if levels else 0.05
    oracle, cusum, cusum_fa = ref.delays(log_c, level)
    return {
        "kind": kind, "healthy": healthy, "margin": margin, "runs": runs,
        "replay_rc": rc, "replay_err": err.strip().splitlines()[-3:],
        "applied": applied, "rejected": rejected, "sent": sent,
        "log_c": log_c, "log_c_from": "replay" if thresholds else
        "fallback log(20*30*86400/0.05)", "level": level,
        "delay": delay, "false_alarm": false_alarm,
        "safe_before": safe_before, "by_detector": by_detector,
        "oracle": oracle, "cusum": cusum, "cusum_false_alarm": cusum_fa,
        "ref": ref,
    }


def use_log_c(r, log_c, source):
    """Recompute a result's references at another log c (a kind with no
    change detector reports none: the caller takes the one the engine
    uses for another kind under the same defaults and family)."""
    r["oracle"], r["cusum"], r["cusum_false_alarm"] = r["ref"].delays(
        log_c, r["level"])
    r["log_c"], r["log_c_from"] = log_c, source
