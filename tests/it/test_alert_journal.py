"""An alert is on disk before it is sent, so a crash never pages twice
(issue 12, item 5, the alert half).

Real stopcockd, real redis-server, a real signed-webhook receiver.
Invented scenario: a seaside bakery chain tests four new checkout pages
(one experiment per town); each raises the error rate, so each raises one
harm alert.

The records come from a Redis stream with checkpoints an hour apart, so
every kill -9 lands before the first checkpoint and Redis delivers every
entry again after the restart: the engine finds the same harms again.

 1. Four harm alerts reach the receiver; kill -9; restart. Every entry is
    applied again, the four findings come back, and none is sent again:
    each raised webhook-id reaches the receiver exactly once (before the
    journal: twice), and the journal says it laid the events over the
    (absent) checkpoint.
 2. A torn last line (a crash half way through a journal write) is
    skipped and counted; the daemon starts and still sends nothing twice.
 3. A clean stop writes the last checkpoint, which covers the journal:
    the file is left empty, and a restart replays nothing and sends
    nothing.

The expected figures come from the test's own records and the receiver's
log, never from the daemon.
"""
import http.client
import json
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Redis, Tap, wait_for  # noqa: E402
from _alertlib import SECRET, Receiver, unit_records  # noqa: E402

GUARDRAILS = """
[guardrail checkout_errors]
metric = checkout_errors
test = proportion
harm = increase
margin = 0
"""
TOWNS = ["whitby", "padstow", "tenby", "oban"]
PER_ENTRY = 200


def entries():
    """Timestamped lines (so a second delivery is the same record), cut
    into stream entries."""
    t0 = time.time() - 900
    lines = []
    for k, town in enumerate(TOWNS):
        rec = unit_records("checkout_" + town, "checkout_errors",
                           [("control", 1500, 0.02),
                            ("new_page", 1500, 0.08)], 40 + k)
        lines += ["@%.3f %s" % (t0 + (len(lines) + i) * 0.001, r)
                  for i, r in enumerate(rec)]
    return [lines[i:i + PER_ENTRY] for i in range(0, len(lines), PER_ENTRY)]


def get(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        return c.getresponse().read().decode()
    finally:
        c.close()


def metric(d, name):
    for line in get(d, "/metrics").splitlines():
        if line.startswith(name + " "):
            return float(line.split()[1])
    return None


def applied(d, n):
    def got():
        try:
            return json.loads(get(d, "/api/health"))["redis"]["entries"] \
                >= n
        except (OSError, ValueError, KeyError, TypeError):
            return False
    return wait_for(got, 30)


def raised_ids(reqs):
    """webhook-id -> number of times the receiver took it, raised only
    (reqs: the receiver's requests, or the receiver itself)."""
    out = {}
    if isinstance(reqs, Receiver):
        reqs = reqs.snapshot()
    for r in reqs:
        doc = r["json"] or {}
        if doc.get("type") == "stopcock.alert.raised" and \
                r["status"] == 200:
            wid = r["headers"].get("webhook-id")
            out[wid] = out.get(wid, 0) + 1
    return out


def journal_path(d):
    return os.path.join(d.state, "alerts.journal")


def journal_size(d):
    try:
        return os.path.getsize(journal_path(d))
    except FileNotFoundError:
        return None


def main():
    tap = Tap()
    rcv = Receiver()
    batches = entries()
    hook = "[webhook ops]\nurl = %s\nsecret = %s\n" % (rcv.url, SECRET)
    with Redis("alert-journal") as redis, \
            Daemon("alert-journal", redis=redis, guardrails=GUARDRAILS,
                   extra=hook, tcp=False, udp=False, unix=False, http=True,
                   daemon_keys={"checkpoint_every": "1h"},
                   redis_keys={"claim_idle": "60s"}) as d:
        for b in batches:
            redis.xadd(d.stream, {"records": "\n".join(b)})
        got = rcv.wait(lambda reqs: len(raised_ids(reqs)) >= len(TOWNS), 40)
        tap.ok(got, "four harm alerts raised and delivered",
               raised_ids(rcv))
        tap.ok(applied(d, len(batches)), "every entry applied")
        tap.ok(d.read_checkpoint() is None,
               "no checkpoint yet: the crash comes before the first one")
        tap.ok((journal_size(d) or 0) > 0,
               "the alert events are in the journal before the crash")

        # 1. kill -9, restart: Redis delivers every entry again.
        d.kill9()
        d.start()
        tap.ok(applied(d, len(batches)), "after kill -9: every entry "
               "applied again (Redis delivered them again)")
        tap.ok(wait_for(lambda: (metric(d, "stopcock_alerts_duplicates_"
                                       "total") or 0) >= len(TOWNS), 20),
               "the four harms were found again (duplicates counted)",
               metric(d, "stopcock_alerts_duplicates_total"))
        time.sleep(1.5)	# give a second send every chance to arrive
        ids = raised_ids(rcv)
        tap.eq(sorted(ids.values()), [1] * len(TOWNS),
               "each raised webhook-id sent exactly once across the crash")
        tap.ok((metric(d, "stopcock_alert_journal_replayed_total") or 0)
               >= len(TOWNS), "journal events laid over the checkpoint",
               metric(d, "stopcock_alert_journal_replayed_total"))
        alerts = json.loads(get(d, "/api/alerts"))["alerts"]
        live = {a.get("experiment") for a in alerts}
        tap.eq(sorted(live), sorted("checkout_" + t for t in TOWNS),
               "the API shows the four alerts after the restart")

        # 2. A torn last line.
        d.kill9()
        with open(journal_path(d), "a") as f:
            f.write('{"seq": 9999, "alert": {"id": "sc_')
        d.start()
        tap.ok(applied(d, len(batches)), "torn journal: the daemon starts "
               "and applies every entry again")
        tap.eq(metric(d, "stopcock_alert_journal_bad_lines_total"), 1.0,
               "the torn line is skipped and counted")
        time.sleep(1.5)
        tap.eq(sorted(raised_ids(rcv).values()), [1] * len(TOWNS),
               "still nothing sent twice after the second crash")
        tap.ok("torn last line skipped" in d.log_text(),
               "the torn line is logged")

        # 3. Clean stop: the final checkpoint covers the journal.
        tap.ok(d.stop() == 0, "clean stop")
        tap.ok(d.read_checkpoint() is not None, "the final checkpoint "
               "is written")
        tap.eq(journal_size(d), 0,
               "the journal is empty once a checkpoint covers it")
        d.start()
        tap.ok(applied(d, 0), "restart from the checkpoint")
        tap.eq(metric(d, "stopcock_alert_journal_replayed_total"), 0.0,
               "nothing replayed from an empty journal")
        time.sleep(1.0)
        tap.eq(sorted(raised_ids(rcv).values()), [1] * len(TOWNS),
               "nothing sent again after a clean restart")
        tap.ok(d.stop() == 0, "clean exit")
    rcv.close()
    return tap.done()


if __name__ == "__main__":
    sys.exit(main())
