"""Redis-fed records under crashes: nothing lost, nothing counted twice,
nothing dead-lettered that did not fail (issue 12, items 1 and 8).

Real stopcockd, real redis-server. Invented scenario: a bicycle-rental app
tests a new unlock flow ("tap") against the current one ("scan").

 1. Crash loop with the shipped defaults (checkpoint_every 5s, claim_idle
    60s, max_deliveries 5): six kill -9s, each before the first checkpoint,
    each restart reading the same pending entries back. Every record ends
    applied exactly once; the dead-letter stream stays empty.
 2. checkpoint_every (12s) longer than claim_idle (1s): the consumer's own
    pending entries sit idle for many claim rounds; it never claims them
    from itself, and after a kill -9 all of them are applied again.
 3. kill -9 while a checkpoint is being written, six times (a ~9 MB state
    so the write takes a while): the old checkpoint stays, every Redis-fed
    record is applied once, nothing is dead-lettered.
 4. Every checkpoint failing for 8 s (a file-size limit stands in for a
    full disk) with claim_idle 1 s, then kill -9: nothing lost.
 5. An entry delivered six times to another consumer that died is not
    poison: it is reclaimed and applied (Redis's delivery counter counts
    reads, not failures).
 6. The crash-loop guard after a death inside a batch: with
    max_deliveries = 1 nothing is dead-lettered on that death alone, since
    it names no entry; the batch is applied again, entry by entry.
 7. Trims: entries applied, then trimmed from the stream while the daemon
    was down before a checkpoint covered them, and entries trimmed before
    they were ever delivered. Both are counted in /metrics and logged with
    their ID range; after catch-up the lag gauge reads 0.

The expected figures are counted from the records the test itself sends
(the outside reference), never from the daemon.
"""
import http.client
import json
import os
import re
import resource
import signal
import time

from _lib import Tap, Redis, Daemon, wait_for, exposures, \
    summary_exposures

GUARDRAILS = """
[guardrail unlock_failed]
metric = unlock_failed
test = proportion
harm = increase
margin = 0
"""

EXP = "unlock_flow"


def entry_lines(i, t):
    """The records of entry i: one exposure per arm and a count each."""
    return ["@%.3f expose %s scan" % (t, EXP),
            "@%.3f expose %s tap" % (t, EXP),
            "@%.3f count %s scan unlock_failed %d 10" % (t, EXP, i % 3),
            "@%.3f count %s tap unlock_failed %d 10" % (t, EXP, i % 4)]


def make_entries(n, t0):
    plan = ["@%.3f plan %s scan=50 tap=50" % (t0, EXP)]
    entries = [plan] + [entry_lines(i, t0 + i * 0.01) for i in range(n)]
    return entries, sum(entries, [])


def health(d):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", "/api/health")
        return json.loads(c.getresponse().read().decode())
    finally:
        c.close()


def metrics(d):
    """{name or name{labels}: value} from /metrics."""
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", "/metrics")
        text = c.getresponse().read().decode()
    finally:
        c.close()
    out = {}
    for line in text.splitlines():
        if line and not line.startswith("#"):
            k, v = line.rsplit(" ", 1)
            out[k] = float(v)
    return out


def applied(d, n):
    """Wait until this process of the daemon has applied n entries."""
    def got():
        try:
            return health(d)["redis"]["entries"] >= n
        except (OSError, ValueError, KeyError, TypeError):
            return False
    return wait_for(got, 20)


def add_all(redis, stream, entries):
    for e in entries:
        redis.xadd(stream, {"records": "\n".join(e)})


def check_exact(tap, d, redis, ck, lines, what):
    tap.eq(Daemon.records(ck, "redis"), len(lines),
           "%s: records applied = records sent" % what)
    tap.eq({k: v for k, v in summary_exposures(ck).items() if k[0] == EXP},
           exposures(lines), "%s: exposures per arm exact" % what)
    dl = ck["counters"]["redis"]["dead_lettered"]
    tap.ok(sum(dl.values()) == 0 and redis.cmd("EXISTS", d.dead) == 0,
           "%s: nothing dead-lettered" % what, dl)


def crashloop_run(tap):
    entries, lines = make_entries(100, time.time() - 600)
    with Redis("faults-loop") as redis, \
            Daemon("faults-loop", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "5s"},
                   redis_keys={"claim_idle": "60s", "block": "2s"}) as d:
        add_all(redis, d.stream, entries)
        early = []
        for k in range(6):
            t = time.time()
            ok = applied(d, len(entries))
            early.append(ok and time.time() - t < 4 and
                         d.read_checkpoint() is None)
            d.kill9()
            d.start()
        tap.ok(all(early), "six kill -9s, each after the entries were "
               "applied and before the first checkpoint", early)
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) >= len(lines),
                               15)
        tap.ok(ck is not None, "crash loop: all records applied in the end")
        check_exact(tap, d, redis, ck or d.read_checkpoint(), lines,
                    "crash loop")
        tap.ok(wait_for(lambda: d.checkpoint() and
                        redis.xpending(d.stream, d.group)[0] == 0, 15),
               "crash loop: every entry acknowledged after a checkpoint")
        tap.ok(d.stop() == 0, "crash loop: clean exit")


def claim_run(tap):
    entries, lines = make_entries(300, time.time() - 600)
    with Redis("faults-claim") as redis, \
            Daemon("faults-claim", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "12s"},
                   redis_keys={"claim_idle": "1s"}) as d:
        t0 = time.time()
        add_all(redis, d.stream, entries)
        tap.ok(applied(d, len(entries)), "claim: entries applied")
        time.sleep(max(0, 8 - (time.time() - t0)))	# ~7 claim rounds
        h = health(d)
        tap.ok(d.read_checkpoint() is None and h["redis"]["claimed"] == 0,
               "claim: no checkpoint yet, none of its own entries claimed "
               "from itself (claimed=%d)" % h["redis"]["claimed"])
        d.kill9()
        d.start()
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) >= len(lines),
                               15)
        tap.ok(ck is not None, "claim: all records applied after the kill")
        check_exact(tap, d, redis, ck or d.read_checkpoint(), lines,
                    "checkpoint_every > claim_idle")
        tap.ok(d.stop() == 0, "claim: clean exit")


def big_state(n):
    """n experiments of TCP-fed records: a checkpoint of ~9 KB each."""
    out = []
    for e in range(n):
        out.append("plan big%d a=50 b=50" % e)
        for arm in "ab":
            out.append("expose big%d %s 100" % (e, arm))
            out += ["observe big%d %s ride_s %d" % (e, arm,
                    10 + v * 37 % 500) for v in range(40)]
            out.append("count big%d %s unlock_failed 3 100" % (e, arm))
    return out


BIG_GUARDRAILS = GUARDRAILS + """
[guardrail ride_p90]
metric = ride_s
test = quantile
quantile = 0.9
harm = decrease
"""


def ckpt_crash_run(tap):
    entries, lines = make_entries(50, time.time() - 600)
    tcp_lines = big_state(1000)
    with Redis("faults-ckpt") as redis, \
            Daemon("faults-ckpt", redis=redis,
                   guardrails="max_experiments = 5000\n" + BIG_GUARDRAILS,
                   udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "1h"},
                   redis_keys={"claim_idle": "60s"}) as d:
        d.send_tcp(tcp_lines)
        ck = d.checkpoint(timeout=30)
        tap.ok(ck is not None and Daemon.records(ck, "tcp") ==
               len(tcp_lines), "ckpt crash: the TCP-fed state is in a "
               "checkpoint (%d bytes)" % len(open(d.checkpoint_path,
                                                   "rb").read()))
        n0 = ck["counters"]["checkpoints"]
        add_all(redis, d.stream, entries)
        inside = []
        for k in range(6):
            tap_ok = applied(d, len(entries))
            d.signal(signal.SIGUSR1)
            time.sleep(0.1)
            d.kill9()
            after = d.read_checkpoint()
            inside.append(tap_ok and after["counters"]["checkpoints"] == n0)
            d.start(timeout=30)
        tap.ok(all(inside), "six kill -9s landed inside a checkpoint write "
               "(the old checkpoint stayed)", inside)
        tap.ok(not any(n.startswith("checkpoint.tmp")
                       for n in os.listdir(d.state)),
               "ckpt crash: no temporary file left after restart")
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "redis") >=
                               len(lines), 40)
        tap.ok(ck is not None, "ckpt crash: all Redis records applied")
        ck = ck or d.read_checkpoint()
        check_exact(tap, d, redis, ck, lines, "crash inside checkpoints")
        tap.eq(Daemon.records(ck, "tcp"), len(tcp_lines),
               "ckpt crash: the TCP-fed state survived whole")
        tap.ok(d.stop() == 0, "ckpt crash: clean exit")


def diskfull_run(tap):
    """Every checkpoint fails for 8 s (a file-size limit stands in for a
    full disk: writes past 256 KB fail with EFBIG, SIGXFSZ ignored),
    claim_idle 1 s, then kill -9 and a restart with room again."""
    entries, lines = make_entries(200, time.time() - 600)

    def full_disk():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)	# kept across exec
        resource.setrlimit(resource.RLIMIT_FSIZE, (256 << 10, 256 << 10))
    with Redis("faults-full") as redis, \
            Daemon("faults-full", redis=redis,
                   guardrails="max_experiments = 5000\n" + BIG_GUARDRAILS,
                   udp=False, unix=False, http=True, args=("-f",),
                   preexec_fn=full_disk,
                   redis_keys={"claim_idle": "1s"}) as d:
        d.send_tcp(big_state(60))	# a checkpoint of ~0.5 MB
        add_all(redis, d.stream, entries)
        tap.ok(applied(d, len(entries)), "disk full: entries applied")
        time.sleep(8)
        log = d.log_text()
        tap.ok(d.read_checkpoint() is None and "checkpoint failed" in log,
               "disk full: every checkpoint failed (%d failures logged)"
               % log.count("checkpoint failed"))
        d.kill9()
        d.preexec_fn = None
        d.start()
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "redis") >=
                               len(lines), 20)
        tap.ok(ck is not None, "disk full: all Redis records applied after "
               "the kill")
        check_exact(tap, d, redis, ck or d.read_checkpoint(), lines,
                    "8 s of failed checkpoints, then a crash")
        tap.ok(d.stop() == 0, "disk full: clean exit")


def ghost_run(tap):
    t0 = time.time() - 60
    with Redis("faults-ghost") as redis:
        stream, group = "stopcock:faults-ghost", "stopcock"
        redis.cmd("XGROUP", "CREATE", stream, group, "$", "MKSTREAM")
        redis.xadd(stream, {"records": "@%.1f plan %s scan=50 tap=50"
                            % (t0, EXP)})
        busy = redis.xadd(stream, {"records": "@%.1f expose %s tap 3"
                                   % (t0, EXP)})
        redis.cmd("XREADGROUP", "GROUP", group, "ghost", "COUNT", "2",
                  "STREAMS", stream, ">")
        for _ in range(5):
            redis.cmd("XCLAIM", stream, group, "ghost", "0", busy)
        time.sleep(1.2)	# older than claim_idle = 1s
        # The Daemon's stream is "stopcock:" + its name: this one.
        with Daemon("faults-ghost", redis=redis, guardrails=GUARDRAILS,
                    tcp=False, udp=False, unix=False, http=True) as d:
            ck = d.wait_checkpoint(lambda c: Daemon.records(c) == 2, 15)
            tap.ok(ck is not None, "ghost: an entry delivered 6 times to a "
                   "dead consumer is reclaimed and applied")
            ck = ck or d.read_checkpoint()
            tap.eq(summary_exposures(ck), {(EXP, "scan"): 0, (EXP, "tap"): 3},
                   "ghost: its exposures counted once")
            tap.ok(redis.cmd("EXISTS", d.dead) == 0, "ghost: not "
                   "dead-lettered")
            tap.ok(d.stop() == 0, "ghost: clean exit")


def guard_run(tap):
    """The crash-loop guard's file as the daemon leaves it after dying
    inside a batch of three entries: with max_deliveries = 1, no entry
    is dead-lettered on that death alone (it names none of them); the
    three are applied again, entry by entry."""
    t0 = time.time() - 60
    with Redis("faults-guard") as redis:
        d = Daemon("faults-guard", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False, http=True, start=False,
                   redis_keys={"max_deliveries": "1"})
        redis.cmd("XGROUP", "CREATE", d.stream, d.group, "$", "MKSTREAM")
        ids = [redis.xadd(d.stream, {"records": r}) for r in (
            "@%.1f plan %s scan=50 tap=50" % (t0, EXP),
            "@%.1f expose %s scan 2" % (t0, EXP),
            "@%.1f expose %s tap 5" % (t0, EXP))]
        redis.cmd("XREADGROUP", "GROUP", d.group, d.consumer, "COUNT", "3",
                  "STREAMS", d.stream, ">")
        os.makedirs(d.state)
        mark = os.path.join(d.state, "redis-applying")
        with open(mark, "w") as f:
            f.write(("A %s %s 0" % (ids[0], ids[2])).ljust(127) + "\n")
        with d:
            d.start()
            ck = d.wait_checkpoint(lambda c: Daemon.records(c) == 3, 15)
            tap.ok(ck is not None, "guard: the three entries of the batch "
                   "the last run died in are applied again")
            ck = ck or d.read_checkpoint()
            tap.eq({k: v for k, v in summary_exposures(ck).items()},
                   {(EXP, "scan"): 2, (EXP, "tap"): 5},
                   "guard: their exposures counted once")
            tap.ok(redis.cmd("EXISTS", d.dead) == 0,
                   "guard: a death inside a batch dead-letters none of it")
            tap.ok("died while applying an entry entry=%s..%s failures=1"
                   % (ids[0], ids[2]) in d.log_text(),
                   "guard: the death and its ID range are logged")
            with open(mark) as f:
                tap.eq(f.read(1), "D", "guard: the file says done after")
            tap.ok(d.stop() == 0, "guard: clean exit")


def trims_run(tap):
    t0 = time.time() - 600
    with Redis("faults-trim") as redis, \
            Daemon("faults-trim", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "1h"}) as d:
        redis.xadd(d.stream, {"records": "@%.1f plan %s scan=50 tap=50"
                              % (t0, EXP)})
        tap.ok(d.wait_checkpoint(lambda c: Daemon.records(c) == 1, 10),
               "trims: plan applied and checkpointed")
        # Delivered and applied, never covered by a checkpoint.
        ids = [redis.xadd(d.stream, {"records": "\n".join(
            entry_lines(i, t0 + i))}) for i in range(5)]
        tap.ok(applied(d, 6), "trims: five entries applied")
        d.kill9()
        # Down: those five are trimmed, then 30 entries come and 20 of
        # them are trimmed before anyone read them.
        redis.cmd("XTRIM", d.stream, "MAXLEN", "0")
        later = [redis.xadd(d.stream, {"records": "@%.1f expose %s scan"
                                       % (t0, EXP)}) for i in range(30)]
        redis.cmd("XTRIM", d.stream, "MAXLEN", "10")
        d.start()
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) == 11, 15)
        tap.ok(ck is not None, "trims: the ten entries left applied")
        m = wait_for(lambda: (lambda x: x if x.get(
            "stopcock_redis_lag") == 0 else None)(metrics(d)), 15)
        m = m or metrics(d)
        tap.eq(m.get('stopcock_redis_trimmed_total{when="pending"}'), 5.0,
               "trims: the 5 applied-but-uncovered entries counted in "
               "/metrics")
        tap.eq(m.get('stopcock_redis_trimmed_total{when="undelivered"}'),
               20.0, "trims: the 20 never-delivered entries counted in "
               "/metrics")
        tap.eq(m.get("stopcock_redis_lag"), 0.0,
               "trims: lag gauge 0 after catch-up")
        log = d.log_text()
        tap.ok(re.search(r"trimmed before they were applied count=5 "
                         r"first=%s last=%s" % (ids[0], ids[-1]), log),
               "trims: the pending ones logged with their ID range")
        tap.ok(re.search(r"trimmed before they were delivered count=20 "
                         r"after=%s before=%s" % (ids[-1], later[20]), log),
               "trims: the undelivered ones logged with their ID range")
        tap.ok(d.stop() == 0, "trims: clean exit")


def main():
    tap = Tap()
    for run in (crashloop_run, claim_run, ckpt_crash_run, diskfull_run,
                ghost_run, guard_run, trims_run):
        t = time.time()
        try:
            run(tap)
        except Exception as e:	# one broken run must not hide the others
            tap.ok(False, "%s raised %r" % (run.__name__, e))
        tap.diag("%s took %.1fs" % (run.__name__, time.time() - t))
    tap.done()


if __name__ == "__main__":
    main()
