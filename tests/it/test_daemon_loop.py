"""The loop never blocks (issue 12, item 7): neither on a systemd notify
socket nobody reads, nor while a big checkpoint is written.

Real stopcockd, real redis-server. Invented scenario: a ferry operator's
booking site tests a new seat map against the old one.

 1. Notify socket never read. systemd's socket holds ten datagrams (the
    kernel's net.unix.max_dgram_qlen); the daemon sends STATUS= every 5 s,
    so a reader that never reads fills it after about a minute. The test
    gets to the same state at once, honestly: it stops reading and fills
    the queue itself. Then, over three status periods (15 s), the daemon
    must keep answering HTTP and applying records; a reload's READY=1,
    refused by the full queue, must arrive once the socket is read again.
 2. A ~20 MB state checkpointed while Redis entries keep coming and
    /api/health is polled every 10 ms: every answer comes within a
    generous bound (the issue asks for 100 ms; the assert allows 300 ms
    for a loaded 2-core machine, the figure is printed), and entries are
    applied while the checkpoint is being written. Then the writer is
    killed half way: the old file stays, the failure is logged, and the
    next checkpoint is written.
"""
import http.client
import json
import os
import signal
import socket
import threading
import time

from _lib import Tap, Redis, Daemon, wait_for, _Resp

GUARDRAILS = """
max_experiments = 100000

[guardrail seat_errors]
metric = seat_errors
test = proportion
harm = increase

[guardrail booking_s]
metric = booking_s
test = quantile
quantile = 0.9
harm = increase
"""


def get(d, path, timeout=5):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=timeout)
    try:
        c.request("GET", path)
        r = c.getresponse()
        return r.status, r.read()
    finally:
        c.close()


def health(d, timeout=5):
    try:
        status, body = get(d, "/api/health", timeout)
        return json.loads(body.decode()) if status == 200 else None
    except (OSError, ValueError):
        return None


def fill(path):
    """Send datagrams to path until its queue refuses more; how many."""
    s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    s.setblocking(False)
    n = 0
    try:
        while n < 10000:
            try:
                s.sendto(b"X_FILLER=1", path)
            except BlockingIOError:
                break
            n += 1
    finally:
        s.close()
    return n


def notify_run(tap):
    with Daemon("loop-notify", guardrails=GUARDRAILS, udp=False,
                unix=False, http=True) as d:
        d.hold_notify()
        d.read_notices()
        queued = fill(d.notify_path)
        tap.ok(0 < queued < 10000, "the notify socket's queue is full "
               "(%d datagrams) and nobody reads it" % queued)
        answers = []
        t0 = time.time()
        while time.time() - t0 < 15:	# three STATUS= periods
            answers.append(health(d) is not None)
            time.sleep(1)
        tap.ok(all(answers), "HTTP answered all along, 15 s of status "
               "notifications into a full socket (%d of %d)"
               % (sum(answers), len(answers)))
        d.send_tcp(["plan seatmap old=50 new=50", "expose seatmap old",
                    "expose seatmap new"])
        ck = d.checkpoint(timeout=10)
        tap.ok(ck is not None and Daemon.records(ck) == 3,
               "records still applied and checkpointed")
        d.signal(signal.SIGHUP)
        time.sleep(1)
        tap.ok(health(d) is not None, "a reload with the queue full "
               "does not freeze the daemon")
        n0 = len(d.notices)
        d.hold_notify(False)
        ready = wait_for(lambda: "READY=1" in d.read_notices()[n0:], 12)
        tap.ok(ready, "the reload's READY=1 arrives once the socket is "
               "read again")
        tap.ok("systemd notification not sent" in d.log_text(),
               "the refused notifications are logged")
        tap.ok(d.stop() == 0, "notify: clean exit")


def big_state(start, stop):
    """The records of experiments start..stop-1."""
    out = []
    for e in range(start, stop):
        out.append("plan ferry%d old=50 new=50" % e)
        for arm in ("old", "new"):
            out.append("expose ferry%d %s 100" % (e, arm))
            out += ["observe ferry%d %s booking_s %d" % (e, arm,
                    10 + v * 37 % 500) for v in range(40)]
            out.append("count ferry%d %s seat_errors 3 100" % (e, arm))
    return out


def latency_run(tap):
    t0 = time.time() - 600
    with Redis("loop-ckpt") as redis, \
            Daemon("loop-ckpt", redis=redis, guardrails=GUARDRAILS,
                   udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "1h"},
                   redis_keys={"block": "100ms"}) as d:
        redis.xadd(d.stream, {"records": "@%.1f plan seatmap old=50 "
                              "new=50" % t0})
        # ~20 MB of state, whatever an experiment's image costs today.
        n, size = 0, 0
        for _ in range(3):
            more = 2300 if n == 0 else int(n * (20.5e6 / size - 1)) + 1
            d.send_tcp(big_state(n, n + more))
            n += more
            ck = d.checkpoint(timeout=60)
            size = os.path.getsize(d.checkpoint_path)
            if size > 18e6:
                break
        tap.ok(ck is not None and size > 18e6,
               "a checkpoint of %.1f MB" % (size / 1e6))
        n0 = ck["counters"]["checkpoints"]
        stop = threading.Event()
        samples = []	# (sent at, latency or None, redis entries)

        def poll():
            while not stop.is_set():
                t = time.time()
                h = health(d, timeout=10)
                samples.append((t, time.time() - t, h["redis"]["entries"]
                                if h else None))
                time.sleep(max(0, 0.01 - (time.time() - t)))

        def produce():
            p = _Resp(redis.port)	# its own connection
            i = 0
            while not stop.is_set():
                p.command("XADD", d.stream, "*", "records",
                      "@%.1f expose seatmap %s" % (t0, ("old", "new")[i % 2]))
                i += 1
                time.sleep(0.01)
            p.close()
        threads = [threading.Thread(target=poll),
                   threading.Thread(target=produce)]
        for th in threads:
            th.start()
        time.sleep(0.5)
        asked = time.time()
        d.signal(signal.SIGUSR1)

        # A new file is a new inode (written aside, renamed over): cheap
        # to watch, where parsing 20 MB every 10 ms would starve the
        # polling thread of the interpreter.
        ino = os.stat(d.checkpoint_path).st_ino
        renamed = wait_for(lambda: os.stat(d.checkpoint_path).st_ino != ino,
                           60, 0.01)
        done = time.time()
        time.sleep(0.5)
        stop.set()
        for th in threads:
            th.join()
        ck2 = d.read_checkpoint() if renamed else None
        ck2 = ck2 if ck2 and ck2["counters"]["checkpoints"] > n0 else None
        tap.ok(ck2 is not None, "the checkpoint was written during ingest "
               "(%.2f s from the request to the new file)" % (done - asked))
        during = [s for s in samples if asked <= s[0] <= done]
        lat = [s[1] for s in samples]
        worst = max(lat) if lat else float("inf")
        tap.diag("health polls: %d, %d during the checkpoint; latency max "
                 "%.1f ms, median %.1f ms" % (len(samples), len(during),
                                             worst * 1e3,
                                             sorted(lat)[len(lat) // 2] * 1e3
                                             if lat else 0))
        tap.ok(all(s[2] is not None for s in samples),
               "every health poll answered")
        tap.ok(worst < 0.3, "the HTTP API answered every 10 ms poll within "
               "300 ms, checkpoint included (max %.1f ms)" % (worst * 1e3))
        # Answered while the checkpoint was being written: asked after
        # the request (+50 ms), answered before the new file (-50 ms).
        inside = [s for s in samples if s[0] >= asked + 0.05 and
                  s[0] + s[1] <= done - 0.05 and s[2] is not None]
        seen = sorted({s[2] for s in inside})
        tap.ok(len(seen) >= 3, "Redis entries applied while the "
               "checkpoint was being written (%d answers inside; entries "
               "%s)" % (len(inside), "%d -> %d" % (seen[0], seen[-1])
                        if seen else "none"))
        # The writer killed half way (as the OOM killer might): the old
        # file stays, the failure is logged, the next checkpoint works.
        n1 = d.read_checkpoint()["counters"]["checkpoints"]
        d.signal(signal.SIGUSR1)
        kids = wait_for(lambda: open("/proc/%d/task/%d/children" % (
            d.proc.pid, d.proc.pid)).read().split(), 5, 0.005)
        if kids:
            os.kill(int(kids[0]), signal.SIGKILL)
        logged = wait_for(lambda: "the writer was killed" in d.log_text(),
                          10)
        tap.ok(kids and logged and d.read_checkpoint()["counters"]
               ["checkpoints"] == n1, "a writer killed half way: logged, "
               "the old checkpoint kept")
        ck3 = d.checkpoint(timeout=60)
        tap.ok(ck3 is not None and ck3["counters"]["checkpoints"] == n1 + 1,
               "the next checkpoint is written")
        tap.ok(d.stop() == 0, "latency: clean exit")


RUNS = (notify_run, latency_run)


def main():
    tap = Tap()
    for run in RUNS:
        t = time.time()
        try:
            run(tap)
        except Exception as e:	# one broken run must not hide the others
            tap.ok(False, "%s raised %r" % (run.__name__, e))
        tap.diag("%s took %.1fs" % (run.__name__, time.time() - t))
    tap.done()


if __name__ == "__main__":
    main()
