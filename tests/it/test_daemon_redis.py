"""stopcockd's Redis stream consumer against a real redis-server.

Invented scenario: a recipe app tests a new ingredient search ("fuzzy")
whose failed searches are far more frequent than the control's.

 1. kill -9 in the middle of a Redis-fed run, twice, with a producer
    writing all along: final exposures and count sums equal the input
    exactly (no loss, no double count); every entry ends acknowledged; the
    harmful arm's verdict is harm, as `stopcock replay` finds too.
 2. Redis stopped and started again on the same port (append-only file):
    the daemon reconnects and nothing is lost.
 3. Redis frozen (SIGSTOP) longer than block + 5 s: the watchdog drops the
    connection, and after SIGCONT records flow again.
 4. An entry without a `records` field, and one the daemon died applying
    max_deliveries times (its crash-loop guard file says four deaths, this
    start is the fifth), end in the dead-letter stream with origin and
    reason; an entry delivered six times to a dead consumer is reclaimed
    and applied, not taken for poison.
"""
import http.client
import json
import os
import random
import signal
import threading
import time

from _lib import Tap, Redis, Daemon, wait_for, replay, final_verdicts, \
    exposures, summary_exposures, summary_verdicts, _Resp

GUARDRAILS = """
[guardrail failed_search]
metric = failed_search
test = proportion
harm = increase
margin = 0
"""

EXP = "ingredient_search"


def unit_lines(rng, i, t):
    arm = "control" if i % 2 == 0 else "fuzzy"
    p = 0.05 if arm == "control" else 0.15
    k = sum(1 for _ in range(4) if rng.random() < p)
    return ["@%.3f expose %s %s" % (t, EXP, arm),
            "@%.3f count %s %s failed_search %d 4" % (t, EXP, arm, k)]


def count_sums(lines):
    """{variant: [k, n]} of the count records, from the text."""
    out = {}
    for l in lines:
        f = l.split()
        if f[1] == "count":
            s = out.setdefault(f[3], [0.0, 0.0])
            s[0] += float(f[5])
            s[1] += float(f[6])
    return out


def api_counts(d):
    """{variant: [k, n]} of the failed_search test through the HTTP API."""
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    c.request("GET", "/api/experiments/" + EXP)
    r = c.getresponse()
    body = json.loads(r.read().decode())
    c.close()
    for t in body.get("tests", []):
        if t["guardrail"] == "failed_search":
            return {a["variant"]: [a["k"], a["n"]] for a in t["arms"]}
    return None


def kill9_run(tap):
    rng = random.Random(7)
    t0 = time.time() - 1800
    plan = "@%.3f plan %s control=50 fuzzy=50" % (t0, EXP)
    entries = [[plan]]
    lines_all = [plan]
    unit = 0
    for e in range(700):
        batch = []
        for _ in range(10):
            batch += unit_lines(rng, unit, t0 + unit * 0.01)
            unit += 1
        entries.append(batch)
        lines_all += batch
    total = len(lines_all)

    with Redis("kill9") as redis, \
            Daemon("kill9", redis=redis, guardrails=GUARDRAILS, tcp=False,
                   udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "100ms"},
                   redis_keys={"batch": "8", "block": "100ms"}) as d:
        producer = _Resp(redis.port)	# its own connection

        def produce():
            for i, batch in enumerate(entries):
                producer.command("XADD", d.stream, "*", "records",
                                 "\n".join(batch))
                if i % 20 == 19:
                    time.sleep(0.03)
        th = threading.Thread(target=produce)
        th.start()
        mids = []
        for when in (0.4, 0.9):
            time.sleep(when - (0.4 if mids else 0))
            ck = d.read_checkpoint()
            d.kill9()
            mids.append(Daemon.records(ck) if ck else 0)
            # restart with the same state directory
            d.start()
        th.join()
        producer.close()
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) >= total,
                               timeout=40)
        tap.ok(all(0 < m < total for m in mids),
               "both kills landed mid-run (applied at kill: %s of %d)"
               % (mids, total))
        if not tap.ok(ck is not None, "all records applied after kills"):
            ck = d.read_checkpoint()
        tap.eq(Daemon.records(ck, "redis"), total,
               "records applied = records sent (no loss, no double count)")
        tap.eq(summary_exposures(ck), exposures(lines_all),
               "exposures per arm exact")
        tap.eq(api_counts(d), count_sums(lines_all),
               "count sums (k, n) per arm exact, read through the API")
        # Acknowledgements follow checkpoints; everything ends acked.
        acked = wait_for(lambda: d.checkpoint() and
                         redis.xpending(d.stream, d.group)[0] == 0, 15)
        tap.ok(acked, "every entry acknowledged after a checkpoint",
               redis.xpending(d.stream, d.group))
        log = d.log_text()
        tap.ok(log.count("checkpoint restored") == 2,
               "restarted twice from the checkpoint")
        tap.ok(d.stop() == 0, "clean exit")
        final = d.read_checkpoint()
        tap.eq(summary_verdicts(final).get((EXP, "failed_search", "fuzzy")),
               "harm", "fed through Redis, the harmful arm's verdict is harm")
        findings, _ = replay(d.conf_path, lines_all)
        tap.eq(final_verdicts(findings).get((EXP, "failed_search", "fuzzy")),
               "harm", "replay of the same records agrees")


def restart_run(tap):
    rng = random.Random(11)
    t0 = time.time() - 600
    plan = "@%.3f plan %s control=50 fuzzy=50" % (t0, EXP)
    lines = [plan] + sum((unit_lines(rng, i, t0 + i * 0.01)
                          for i in range(400)), [])
    half = len(lines) // 2
    with Redis("restart", appendonly=True) as redis, \
            Daemon("restart", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False) as d:
        for i in range(0, half, 20):
            redis.xadd(d.stream, {"records": "\n".join(lines[i:i + 20])})
        tap.ok(d.wait_checkpoint(lambda c: Daemon.records(c) == half, 15),
               "first half applied")
        redis.stop()
        time.sleep(0.7)
        redis.start()
        for i in range(half, len(lines), 20):
            redis.xadd(d.stream, {"records": "\n".join(lines[i:i + 20])})
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) == len(lines), 25)
        tap.ok(ck is not None, "after the Redis restart, all records applied")
        ck = ck or d.read_checkpoint()
        tap.eq(summary_exposures(ck), exposures(lines),
               "exposures exact across the Redis restart")
        tap.ok(ck["counters"]["redis"]["reconnects"] > 0,
               "the consumer reconnected (%d attempts)"
               % ck["counters"]["redis"]["reconnects"])
        tap.ok("connection lost" in d.log_text(), "the loss was logged")
        tap.ok(d.stop() == 0, "clean exit")


def watchdog_run(tap):
    t0 = time.time() - 60
    with Redis("watchdog") as redis, \
            Daemon("watchdog", redis=redis, guardrails=GUARDRAILS,
                   tcp=False, udp=False, unix=False,
                   redis_keys={"block": "100ms"}) as d:
        redis.xadd(d.stream, {"records": "@%.1f plan %s control=50 fuzzy=50"
                              % (t0, EXP)})
        tap.ok(d.wait_checkpoint(lambda c: Daemon.records(c) == 1, 10),
               "plan applied")
        redis.proc.send_signal(signal.SIGSTOP)
        try:
            dropped = wait_for(lambda: "no answer in" in d.log_text(), 12)
        finally:
            redis.proc.send_signal(signal.SIGCONT)
        tap.ok(dropped, "a frozen Redis is dropped by the watchdog")
        redis.xadd(d.stream, {"records": "@%.1f expose %s control\n"
                              "@%.1f expose %s fuzzy" % (t0, EXP, t0, EXP)})
        tap.ok(d.wait_checkpoint(lambda c: Daemon.records(c) == 3, 20),
               "records flow again after SIGCONT")
        tap.ok(d.stop() == 0, "clean exit")


def poison_run(tap):
    t0 = time.time() - 60
    with Redis("poison") as redis:
        stream, group = "stopcock:poison", "stopcock"
        dead = "stopcock:poison:dead"
        consumer = "it-poison"
        redis.cmd("XGROUP", "CREATE", stream, group, "$", "MKSTREAM")
        redis.xadd(stream, {"records": "@%.1f plan %s control=50 "
                                      "fuzzy=50" % (t0, EXP)})
        # Delivered to us before "crashes": the daemon died applying it
        # four times already (the crash-loop guard's file says so, as
        # the daemon writes it), so this start makes the fifth failure.
        crashy_id = redis.xadd(stream, {"records": "@%.1f expose %s control"
                                        % (t0, EXP), "origin_app": "mobile"})
        redis.cmd("XREADGROUP", "GROUP", group, consumer, "COUNT", "2",
                  "STREAMS", stream, ">")
        # Delivered six times to "ghost", which died: Redis's delivery
        # counter is not a failure count, so it is reclaimed and applied.
        busy_id = redis.xadd(stream, {"records": "@%.1f expose %s fuzzy 7"
                                      % (t0, EXP)})
        redis.cmd("XREADGROUP", "GROUP", group, "ghost", "COUNT", "1",
                  "STREAMS", stream, ">")
        for _ in range(5):
            redis.cmd("XCLAIM", stream, group, "ghost", "0", busy_id)
        time.sleep(1.2)	# older than claim_idle = 1s
        d = Daemon("poison", redis=redis, guardrails=GUARDRAILS, tcp=False,
                   udp=False, unix=False, start=False)
        d.stream, d.dead, d.consumer = stream, dead, consumer
        d.write_conf(d._conf(GUARDRAILS, "", {}, {"stream": stream,
                                                  "dead_letter": dead,
                                                  "consumer": consumer}))
        os.makedirs(d.state)
        with open(os.path.join(d.state, "redis-applying"), "w") as f:
            f.write(("A %s %s 4" % (crashy_id, crashy_id)).ljust(127) +
                    "\n")
        with d:
            d.start()
            no_rec_id = redis.xadd(stream, {"note": "no records here"})
            ck = d.wait_checkpoint(
                lambda c: c["counters"]["redis"]["dead_lettered"]
                ["apply_failed"] == 1 and
                c["counters"]["redis"]["dead_lettered"]["no_records"] == 1
                and Daemon.records(c) == 2, 15)
            tap.ok(ck is not None, "the entry that failed 5 times and the "
                   "one without records dead-lettered, the idle one "
                   "reclaimed and applied")
            ck = ck or d.read_checkpoint()
            tap.diag(json.dumps(ck["counters"]["redis"]))
            dl = {f.get("origin"): f for _, f in redis.xrange(dead)}
            tap.ok(crashy_id in dl and dl[crashy_id].get("reason") ==
                   "apply_failed" and dl[crashy_id].get("origin_app") ==
                   "mobile", "failed entry in the dead-letter stream with "
                   "its fields, origin and reason", dl)
            tap.ok(no_rec_id in dl and dl[no_rec_id].get("reason") ==
                   "no_records" and dl[no_rec_id].get("note") ==
                   "no records here", "entry without records in the "
                   "dead-letter stream", dl)
            tap.ok(busy_id not in dl, "the entry delivered 6 times to a "
                   "dead consumer is not dead-lettered")
            tap.eq(summary_exposures(ck), {(EXP, "control"): 0,
                                           (EXP, "fuzzy"): 7},
                   "reclaimed entry applied; the failed one was not")
            tap.ok(ck["counters"]["redis"]["claimed"] >= 1,
                   "reclaim counted")
            log = d.log_text()
            tap.ok("died while applying an entry entry=%s failures=5"
                   % crashy_id in log and "failed to apply 5 times" in log,
                   "the failure count and the dead letter are logged")
            gone = wait_for(lambda: d.checkpoint() and
                            redis.xpending(stream, group)[0] == 0, 10)
            tap.ok(gone, "nothing left pending", redis.xpending(stream, group))
            tap.ok(d.stop() == 0, "clean exit")


def main():
    tap = Tap()
    for run in (kill9_run, restart_run, watchdog_run, poison_run):
        t = time.time()
        run(tap)
        tap.diag("%s took %.1fs" % (run.__name__, time.time() - t))
    tap.done()


if __name__ == "__main__":
    main()
