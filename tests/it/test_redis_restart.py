"""A Redis input that loses nothing written after a fault (issue 13, item 8).

Real stopcockd, real redis-server. Invented scenario: a podcast app tests a
new download queue ("parallel") against the current one ("serial").

 1. Redis restarted without persistence mid-run: the stream and the group
    are gone. While the daemon cannot yet read (the new server asks for a
    password for a moment, so the order is certain), 40 entries are
    written, more once it reads again. Every one of them is applied
    exactly once: the group is made again after the last checkpointed
    entry, counted and logged. A second restart with nothing written
    before the daemon reads: the stream holds nothing as far as the last
    applied entry, so the group is made at its start; later entries are
    applied exactly once.
 2. XGROUP DESTROY mid-run, in one transaction with more XADDs: the group
    is made again after the last checkpointed entry; none is lost, none
    counted twice.
 3. [redis] start = beginning on a stream that already holds entries: all
    of them are applied.
 4. start = end (the default) on the same kind of stream: the log and
    /metrics say how many entries were skipped, and only later ones are
    applied.

The expected figures are counted from the records the test itself writes
(the outside reference), never from the daemon.
"""
import os
import subprocess
import time

from _lib import Tap, Redis, Daemon, wait_for, exposures, metrics, \
    summary_exposures, REDIS_SERVER, _Resp, RespError

GUARDRAILS = """
[guardrail download_failed]
metric = download_failed
test = proportion
harm = increase
margin = 0
"""

EXP = "download_queue"


def entry_lines(i, t):
    return ["@%.3f expose %s serial" % (t, EXP),
            "@%.3f expose %s parallel" % (t, EXP),
            "@%.3f count %s serial download_failed %d 8" % (t, EXP, i % 3),
            "@%.3f count %s parallel download_failed %d 8" % (t, EXP, i % 5)]


class Feed:
    """Entries written so far: their lines are the expected tallies."""

    def __init__(self, t0):
        self.t = t0
        self.i = 0
        self.lines = []

    def plan(self):
        e = ["@%.3f plan %s serial=50 parallel=50" % (self.t, EXP)]
        self.lines += e
        return "\n".join(e)

    def next(self):
        e = entry_lines(self.i, self.t + self.i * 0.01)
        self.i += 1
        self.lines += e
        return "\n".join(e)


def applied_records(d, n):
    """Wait until the checkpoint holds n records from Redis; the last one."""
    return d.wait_checkpoint(lambda ck: Daemon.records(ck, "redis") >= n, 30)


def check_exact(tap, d, feed, what):
    # Let anything extra (a double count) arrive before judging.
    ck = applied_records(d, len(feed.lines))
    time.sleep(1.0)
    ck = d.checkpoint() or ck
    tap.ok(ck is not None, "%s: a checkpoint was written" % what)
    if ck is None:
        return
    tap.eq(Daemon.records(ck, "redis"), len(feed.lines),
           "%s: records applied = records written" % what)
    tap.eq({k: v for k, v in summary_exposures(ck).items() if k[0] == EXP},
           exposures(feed.lines), "%s: exposures per arm exact" % what)


def restart_locked(redis, password, timeout=10):
    """Start redis-server again on its port and directory, empty, asking
    for a password: the daemon's commands fail until unlock()."""
    args = [REDIS_SERVER, "--port", str(redis.port), "--bind", "127.0.0.1",
            "--dir", redis.dir, "--save", "", "--daemonize", "no",
            "--logfile", redis.logpath, "--appendonly", "no",
            "--requirepass", password]
    redis.proc = subprocess.Popen(args, stdin=subprocess.DEVNULL,
                                  stdout=subprocess.DEVNULL,
                                  stderr=subprocess.DEVNULL)

    def up():
        try:
            c = _Resp(redis.port, timeout=1)
            ok = c.command("AUTH", password) == "OK"
            c.close()
            return ok
        except (OSError, RespError):
            return False
    if not wait_for(up, timeout):
        raise RuntimeError("redis-server did not start")
    redis.conn = _Resp(redis.port)
    redis.conn.command("AUTH", password)


def made(d, origin):
    return metrics(d).get('stopcock_redis_group_made_total{from="%s"}'
                          % origin)


def restart_run(tap):
    with Redis("rs-restart") as redis, \
            Daemon("rs-restart", redis=redis, guardrails=GUARDRAILS,
                   http=True) as d:
        feed = Feed(time.time() - 600)
        redis.xadd(d.stream, {"records": feed.plan()})
        for _ in range(30):
            redis.xadd(d.stream, {"records": feed.next()})
        tap.ok(applied_records(d, len(feed.lines)) is not None,
               "restart: the first 30 entries applied and checkpointed")
        redis.stop()		# --save '' and no AOF: everything is lost
        time.sleep(0.5)
        restart_locked(redis, "it-h8-lock")
        for _ in range(40):
            redis.xadd(d.stream, {"records": feed.next()})
        redis.cmd("CONFIG", "SET", "requirepass", "")
        tap.ok(applied_records(d, len(feed.lines)) is not None,
               "restart: the 40 entries written before the daemon could "
               "read again are applied")
        for _ in range(15):
            redis.xadd(d.stream, {"records": feed.next()})
        check_exact(tap, d, feed, "restart")
        tap.eq(made(d, "checkpoint"), 1.0,
               "restart: group_made_total{from=checkpoint} is 1")
        tap.ok("made again after the last checkpointed entry"
               in d.log_text(),
               "restart: the log says the group was made again and where")

        # Again, with nothing written before the daemon reads: the stream
        # holds nothing as far as the last applied entry, so the group is
        # made at its start, and what comes next is applied.
        redis.stop()
        time.sleep(0.5)
        restart_locked(redis, "it-h8-lock")
        redis.cmd("CONFIG", "SET", "requirepass", "")
        tap.ok(d.wait_group(30), "restart 2: the group is made again")
        for _ in range(12):
            redis.xadd(d.stream, {"records": feed.next()})
        check_exact(tap, d, feed, "restart 2")
        tap.eq(made(d, "stream_start"), 1.0,
               "restart 2: group_made_total{from=stream_start} is 1")
        tap.ok("made again at the stream's start" in d.log_text(),
               "restart 2: the log says it was made at the stream's start")


def destroy_run(tap):
    with Redis("rs-destroy") as redis, \
            Daemon("rs-destroy", redis=redis, guardrails=GUARDRAILS,
                   http=True) as d:
        feed = Feed(time.time() - 600)
        redis.xadd(d.stream, {"records": feed.plan()})
        for _ in range(25):
            redis.xadd(d.stream, {"records": feed.next()})
        tap.ok(applied_records(d, len(feed.lines)) is not None,
               "destroy: the first 25 entries applied and checkpointed")
        # The group goes and entries arrive in one transaction: whatever
        # the daemon does next, they were written after the group was gone.
        redis.cmd("MULTI")
        redis.cmd("XGROUP", "DESTROY", d.stream, d.group)
        for _ in range(12):
            redis.cmd("XADD", d.stream, "*", "records", feed.next())
        r = redis.cmd("EXEC")
        tap.ok(isinstance(r, list) and r[0] == 1,
               "destroy: XGROUP DESTROY ran with the XADDs", r)
        tap.ok(applied_records(d, len(feed.lines)) is not None,
               "destroy: entries written after the group was gone applied")
        for _ in range(10):
            redis.xadd(d.stream, {"records": feed.next()})
        check_exact(tap, d, feed, "destroy")
        tap.eq(made(d, "checkpoint"), 1.0,
               "destroy: group_made_total{from=checkpoint} is 1")
        tap.ok("made again after the last checkpointed entry"
               in d.log_text(), "destroy: the log says where it was made")


def prefill(redis, stream, n):
    feed = Feed(time.time() - 600)
    redis.xadd(stream, {"records": feed.plan()})
    for _ in range(n - 1):
        redis.xadd(stream, {"records": feed.next()})
    return feed


def beginning_run(tap):
    with Redis("rs-begin") as redis:
        stream = "stopcock:rs-begin"
        feed = prefill(redis, stream, 40)
        with Daemon("rs-begin", redis=redis, guardrails=GUARDRAILS,
                    http=True, redis_keys={"start": "beginning"}) as d:
            check_exact(tap, d, feed, "start = beginning")
            tap.ok("start = beginning): entries=40" in d.log_text(),
                   "start = beginning: logged with the stream's 40 entries")
            tap.eq(made(d, "beginning"), 1.0,
                   "start = beginning: group_made_total{from=beginning}")


def end_run(tap):
    with Redis("rs-end") as redis:
        stream = "stopcock:rs-end"
        old = prefill(redis, stream, 33)
        with Daemon("rs-end", redis=redis, guardrails=GUARDRAILS,
                    http=True) as d:
            tap.ok("(start = end): skipped entries=33" in d.log_text(),
                   "start = end: the log says 33 entries were skipped")
            tap.eq(metrics(d).get("stopcock_redis_start_skipped_total"),
                   33.0, "start = end: start_skipped_total is 33")
            feed = Feed(old.t + 1)
            feed.i = old.i
            redis.xadd(stream, {"records": feed.plan()})
            for _ in range(9):
                redis.xadd(stream, {"records": feed.next()})
            check_exact(tap, d, feed, "start = end, later entries")


def main():
    tap = Tap()
    for run in (restart_run, destroy_run, beginning_run, end_run):
        t = time.time()
        try:
            run(tap)
        except Exception as e:	# one broken run must not hide the others
            tap.ok(False, "%s raised %r" % (run.__name__, e))
        tap.diag("%s took %.1fs" % (run.__name__, time.time() - t))
    tap.done()


if __name__ == "__main__":
    main()
