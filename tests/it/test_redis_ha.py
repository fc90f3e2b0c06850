"""Two stopcockd on one Redis stream: one consumes, one stands by
(issue 14, the Redis part).

Real redis-server, two real daemons with [redis] ha = yes and a 2 s
lease. Invented scenario: a ferry operator tests boarding by row
("by_row") against boarding by zone ("by_zone"); the guardrail is the
share of sailings that leave late.

 1. A takes the lease, B stands by (API role, /metrics gauge).
 2. Entries flow while A is killed with SIGKILL: B takes over within the
    lease's TTL and a poll, from A's checkpoint in Redis; when the feed
    ends B's tallies (exposures, late and sailings per arm, read through
    the API) equal the records written, and its records counter equals a
    `stopcock replay` of the same lines: nothing lost, nothing counted
    twice.
 3. A comes back (standby). B is stopped with SIGSTOP past the TTL while
    entries flow: A takes over. B is asked for a checkpoint (SIGUSR1)
    and resumed: Redis refuses its stale write (fenced counter), it
    applies nothing more, its role is no longer active, and the state
    key holds A's checkpoint only. A's tallies equal everything written.
 4. A stopped with SIGTERM gives the lease up with its last checkpoint;
    B takes it.
 5. Without ha, a second daemon on the same group refuses to consume (log,
    role "refused", counter); the first applies every entry and the
    group has one consumer: nothing split.

The expected figures are counted from the lines the test writes.
"""
import http.client
import json
import os
import signal
import threading
import time

from _lib import Tap, Redis, Daemon, wait_for, metrics, replay

GUARDRAILS = """
[guardrail late_departure]
metric = late
test = proportion
harm = increase
margin = 0
"""

EXP = "boarding_order"
ARMS = ("by_zone", "by_row")
TTL = 2.0
STREAM = "stopcock:ferry"


def get(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        r = c.getresponse()
        return r.status, json.loads(r.read().decode())
    finally:
        c.close()


def health(d):
    try:
        return get(d, "/api/health")[1]
    except (OSError, ValueError):
        return None


def role(d):
    h = health(d)
    return h["redis"].get("role") if h and h.get("redis") else None


def tallies(d):
    """{arm: [exposures, k, n]} of EXP as the daemon's API shows it."""
    st, lst = get(d, "/api/experiments")
    out = {}
    for e in lst["experiments"]:
        if e["id"] != EXP:
            continue
        for a in e["arms"]:
            out[a["variant"]] = [a["exposures"], 0, 0]
        st, one = get(d, "/api/experiments/" + EXP)
        for t in one.get("tests", []):
            if t["guardrail"] == "late_departure":
                for a in t["arms"]:
                    out[a["variant"]][1:] = [int(a["k"]), int(a["n"])]
    return out


class Feed:
    """Entries written to the stream; their lines are the reference."""

    def __init__(self, redis, stream):
        self.redis = redis
        self.stream = stream
        self.lines = []
        self.want = {a: [0, 0, 0] for a in ARMS}
        self.i = 0
        self.lock = threading.Lock()

    def plan(self):
        line = "plan %s by_zone=50 by_row=50" % EXP
        self.redis.xadd(self.stream, {"records": line})
        self.lines.append(line)

    def entry(self):
        i = self.i
        self.i += 1
        lines = []
        for j, arm in enumerate(ARMS):
            late = (i * 7 + j) % 5 == 0
            lines += ["expose %s %s" % (EXP, arm),
                      "count %s %s late %d 1" % (EXP, arm, int(late))]
            w = self.want[arm]
            w[0] += 1
            w[1] += int(late)
            w[2] += 1
        self.redis.xadd(self.stream, {"records": "\n".join(lines)})
        with self.lock:
            self.lines += lines

    def run(self, n, rate):
        for _ in range(n):
            self.entry()
            time.sleep(1.0 / rate)

    def background(self, n, rate):
        t = threading.Thread(target=self.run, args=(n, rate), daemon=True)
        t.start()
        return t


TOKEN = "it-ferry-token-0123456789"


def post(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("POST", path, body=b"{}",
                  headers={"Authorization": "Bearer " + TOKEN})
        r = c.getresponse()
        return r.status, r.read().decode()
    finally:
        c.close()


def ha_daemon(name, redis):
    d = Daemon(name, redis=redis, guardrails=GUARDRAILS, tcp=False,
               udp=False, unix=False, http=True, start=False,
               daemon_keys={"http_token": TOKEN},
               redis_keys={"stream": STREAM, "ha": "yes",
                           "lease_ttl": "%gs" % TTL,
                           "consumer": "ferry-active", "batch": "20",
                           "start": "beginning"})
    d.stream = STREAM
    return d


def metric(d, name):
    return metrics(d).get(name)


def exact(tap, d, feed, what):
    ok = wait_for(lambda: tallies(d) == feed.want, 30, 0.2)
    time.sleep(1.0)	# let a double count, if any, arrive
    got = tallies(d)
    tap.ok(ok and got == feed.want, "%s: tallies per arm equal the records "
           "written" % what, "got %r want %r" % (got, feed.want))
    return got == feed.want


def ha_run(tap):
    with Redis("redis-ha") as redis:
        a = ha_daemon("ha-a", redis)
        b = ha_daemon("ha-b", redis)
        try:
            a.start()
            tap.ok(wait_for(lambda: role(a) == "active", 10),
                   "A holds the lease and consumes")
            b.start(wait=True)
            tap.ok(wait_for(lambda: role(b) == "standby", 10),
                   "B stands by")
            tap.eq((metric(a, "stopcock_redis_active"),
                    metric(b, "stopcock_redis_active")), (1.0, 0.0),
                   "/metrics: the active gauge is 1 on A, 0 on B")

            feed = Feed(redis, STREAM)
            feed.plan()
            t = feed.background(600, 150)
            time.sleep(1.5)
            a.kill9()
            killed = time.time()
            took = wait_for(lambda: role(b) == "active", 15, 0.05)
            delay = time.time() - killed
            tap.ok(took and delay < TTL + TTL / 4 + 1.5,
                   "B took over %.2fs after A was killed (TTL %gs + a "
                   "quarter-TTL poll)" % (delay, TTL))
            t.join()
            exact(tap, b, feed, "after kill -9 of the active daemon")
            hb = health(b)
            tap.eq(hb["redis"]["lease"]["takeovers"], 1,
                   "B counts one takeover (API)")
            tap.eq(metric(b, "stopcock_redis_takeovers_total"), 1.0,
                   "B counts one takeover (/metrics)")
            _, summary = replay(b.conf_path, feed.lines)
            tap.eq(metric(b, 'stopcock_records_total{source="redis"}'),
                   float(summary["records"]),
                   "B's records counter equals a stopcock replay of the "
                   "same lines (%d)" % summary["records"])

            # 3. SIGSTOP the active one past the TTL.
            a.start()
            tap.ok(wait_for(lambda: role(a) == "standby", 10),
                   "A, restarted, stands by")
            st, text = post(a, "/api/experiments/%s/epoch" % EXP)
            tap.ok(st == 503 and "standby" in text,
                   "an operator action sent to the standby is refused "
                   "(%d)" % st, text)
            before_entries = health(b)["redis"]["entries"]
            before = tallies(b)
            b.signal(signal.SIGSTOP)
            stopped = time.time()
            t = feed.background(300, 150)
            took = wait_for(lambda: role(a) == "active", 15, 0.05)
            tap.ok(took, "A took over %.2fs after B was stopped"
                   % (time.time() - stopped))
            t.join()
            while time.time() - stopped < 2 * TTL:
                time.sleep(0.1)
            b.signal(signal.SIGUSR1)	# a checkpoint, asked while stopped
            b.signal(signal.SIGCONT)
            tap.ok(wait_for(lambda: (metric(b, "stopcock_redis_lease_"
                                            "fenced_total") or 0) >= 1, 10),
                   "B's checkpoint after the resume was refused by Redis "
                   "(fenced)")
            tap.ok(wait_for(lambda: role(b) in ("standby", "unknown"), 10),
                   "B, resumed, no longer consumes (role %s)" % role(b))
            exact(tap, a, feed, "after SIGSTOP of the active daemon")
            time.sleep(1.0)
            hb = health(b)
            tap.eq((hb["redis"]["entries"], tallies(b)),
                   (before_entries, before),
                   "B applied nothing after it was stopped")
            tap.eq(metric(b, "stopcock_redis_active"), 0.0,
                   "B's active gauge is 0")
            # The state key: A's checkpoint (A writes every 200 ms).
            time.sleep(0.5)
            raw = redis.cmd("GET", "%s:stopcock:state" % STREAM)
            if isinstance(raw, bytes):
                raw = raw.decode()
            body = json.loads(raw.split("\n", 1)[1])
            tap.eq(body["writer"]["pid"], a.proc.pid,
                   "the checkpoint in Redis is A's")
            tap.ok("refused by Redis" in b.log_text(),
                   "B's log says its checkpoint was refused")
            # A clean stop of the holder gives the lease up with its last
            # checkpoint: nobody has to wait for it to expire.
            with open(os.path.join(a.state, "redis-lease")) as f:
                token_a = f.read().strip()
            tap.eq(a.stop(), 0, "A stops cleanly")
            held = redis.cmd("GET", "%s:stopcock:lease" % STREAM)
            if isinstance(held, bytes):
                held = held.decode()
            tap.ok(held != token_a, "A gave the lease up as it stopped")
            tap.ok(wait_for(lambda: role(b) == "active", 5, 0.05),
                   "B took the lease A gave up")
            exact(tap, b, feed, "after A handed over")
        finally:
            a.close()
            b.close()


def guard_run(tap):
    """Without ha: the second daemon on the group refuses."""
    with Redis("redis-guard") as redis:
        # Only keys the daemon had before the lease: the same test on
        # the old daemon shows the split.
        keys = {"stream": "stopcock:ferry-guard", "start": "beginning"}
        c = Daemon("guard-c", redis=redis, guardrails=GUARDRAILS, tcp=False,
                   udp=False, unix=False, http=True, start=False,
                   redis_keys=keys)
        e = Daemon("guard-e", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False, http=True, start=False,
                   redis_keys=keys)
        c.stream = e.stream = keys["stream"]
        try:
            c.start()
            tap.ok(wait_for(lambda: role(c) == "active", 10),
                   "guard: the first daemon consumes")
            e.start(wait=False)
            tap.ok(wait_for(lambda: role(e) == "refused", 10),
                   "guard: the second daemon on the group refuses to "
                   "consume")
            feed = Feed(redis, keys["stream"])
            feed.plan()
            feed.run(300, 300)
            exact(tap, c, feed, "guard: the first daemon")
            tap.eq((health(e)["redis"]["entries"], tallies(e)), (0, {}),
                   "guard: the second read and applied nothing")
            tap.ok((metric(e, "stopcock_redis_lease_refused_total") or 0)
                   >= 1, "guard: the refusal is counted")
            tap.ok("refusing to consume" in e.log_text(),
                   "guard: the refusal is in the log")
            names = [dict(zip(x[0::2], x[1::2]))["name"] for x in
                     redis.cmd("XINFO", "CONSUMERS", keys["stream"],
                               "stopcock")]
            names = [n.decode() if isinstance(n, bytes) else n
                     for n in names]
            tap.eq(names, [c.consumer], "guard: the group has one consumer")
        finally:
            c.close()
            e.close()


def main():
    tap = Tap()
    ha_run(tap)
    guard_run(tap)
    tap.done()


if __name__ == "__main__":
    main()
