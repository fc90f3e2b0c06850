"""Alerts not yet delivered travel in the Kafka partition's state.

Invented scenario: a ferry operator tries a quicker boarding page
(ferry_quick_boarding) and watches failed bookings; the new page fails a
quarter of them, the old one 3%, so the guardrail (action = pause) finds
harm and pauses. Both receivers, the on-call webhook and the pause URL,
are down (503) when that happens: the daemon keeps both deliveries
queued and commits them with the partition's state. It is then killed
with SIGKILL (its local spool dies with the host, as far as the group is
concerned); a second daemon with its own state directory takes the
partitions over, rebuilds the engine from the state topic (already at
harm, so nothing is raised again) and queues the carried deliveries. The
receivers come back: each gets the harm alert and the pause from the new
owner with the same webhook-ids the first owner used, signed (checked
with Python's hmac, _alertlib.verify), and nothing else. Then a second
experiment turns harmful on the new owner: with max_per_hour = 1, the
pause the partition carried counts in the new owner's hourly limit, so
this one is refused (rate_limited, audited) and nothing more reaches the
pause URL.

Runs against librdkafka's mock cluster (tests/tools/kafkamock.c, see
test_kafka.py).
"""
import json
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Tap, wait_for  # noqa: E402
from _alertlib import PAUSE_SECRET, SECRET, Receiver, harmful_records  # noqa
from test_kafka import Mock, kafka_daemon, partitions, messages, \
    uncommitted  # noqa: E402

NPART = 4
EXP = "ferry_quick_boarding"
OTHER = "ferry_seat_map"
GUARDRAILS = """
[guardrail failed_booking]
metric = failed_booking
test = proportion
harm = increase
margin = 0
action = pause
"""


def outputs(ops, prcv):
    return """
[webhook oncall]
url = %s
secret = %s
kinds = harm
timeout = 1s
backoff_cap = 1s
probe = 1s

[pause]
url = %s
secret = %s
max_per_hour = 1
""" % (ops.url, SECRET, prcv.url, PAUSE_SECRET)


def audit(d):
    path = os.path.join(d.state, "pause-audit.log")
    try:
        with open(path) as f:
            return [json.loads(line) for line in f if line.strip()]
    except FileNotFoundError:
        return []


def ids(reqs, status=None, kind=None):
    return {r["headers"].get("webhook-id") for r in reqs
            if (status is None or r["status"] == status) and
            (kind is None or (r["json"] or {}).get("type") == kind)}


def main():
    tap = Tap()
    mock = Mock(NPART, "kafka-mock-spool")
    ops = Receiver(default=503)
    prcv = Receiver(secret=PAUSE_SECRET, default=503)
    ds = []
    try:
        def daemon(name):
            d = kafka_daemon(name, mock, "ferry", "it-" + name,
                             guardrails=GUARDRAILS, extra=outputs(ops, prcv))
            ds.append(d)
            return d

        a = daemon("kafka-spool-a")
        tap.ok(wait_for(lambda: partitions(a) == set(range(NPART)), 30),
               "the first daemon owns the %d partitions" % NPART)
        lines = harmful_records(EXP, "failed_booking", 400, 0.03, 0.25, 7)
        for i in range(0, len(lines), 40):
            mock.send(EXP, lines[i:i + 40])
        total = mock.sent
        tap.eq(mock.flush(), (total, 0), "%d messages produced" % total)

        raised = ops.wait(lambda r: ids(r, kind="stopcock.alert.raised"),
                          30)
        paused = prcv.wait(lambda r: ids(r), 30)
        tap.ok(len(raised) == 1 and len(paused) == 1, "the harm alert and "
               "the pause were tried while both receivers answer 503",
               "alert ids %r, pause ids %r" % (raised, paused))
        tap.ok(wait_for(lambda: messages(a) == total and
                        uncommitted(a) == 0, 30),
               "the first daemon read everything and committed its "
               "partitions' states")
        time.sleep(0.6)	# a commit or two more: nothing is left to carry
        a.kill9()
        tap.ok(not ids(ops.snapshot(), status=200) and
               not ids(prcv.snapshot(), status=200),
               "killed with SIGKILL before either receiver took anything")

        b = daemon("kafka-spool-b")
        tap.ok(wait_for(lambda: partitions(b) == set(range(NPART)), 60),
               "a second daemon, its own state directory, takes the "
               "partitions over")
        tap.ok(wait_for(lambda: messages(b) == total, 30),
               "it rebuilt the partitions from the state topic")
        before = len(ops.snapshot()) + len(prcv.snapshot())
        ops.default = 200
        prcv.default = 200
        got = ops.wait(lambda r: ids(r, status=200,
                                     kind="stopcock.alert.raised"), 30)
        tap.eq(got, raised, "the new owner delivered the harm alert with "
               "the first owner's webhook-id")
        got = prcv.wait(lambda r: ids(r, status=200), 30)
        tap.eq(got, paused, "and the pause, with its webhook-id")
        after = ops.snapshot() + prcv.snapshot()
        tap.ok(all(r["error"] is None for r in after[before:]),
               "the new owner's deliveries are signed",
               repr([r["error"] for r in after[before:]]))
        tap.ok("deliveries carried in the partition's state queued again"
               in b.log_text(), "its log says where they came from")
        time.sleep(2)	# the tick's reminders and anything else
        tap.eq((ids(ops.snapshot()), ids(prcv.snapshot())),
               (raised, paused), "nothing but those two was sent: the "
               "restored engine raised nothing again")

        # the hourly pause limit (1) counts the carried pause: another
        # harmful experiment on the new owner is not paused
        more = harmful_records(OTHER, "failed_booking", 400, 0.03, 0.25, 8)
        for i in range(0, len(more), 40):
            mock.send(OTHER, more[i:i + 40])
        total = mock.sent
        mock.flush()
        tap.ok(wait_for(lambda: [x for x in audit(b)
                                 if x["experiment"] == OTHER], 30),
               "a second harmful experiment reaches the pause policy")
        tap.eq([(x["decision"], x["reason"]) for x in audit(b)
                if x["experiment"] == OTHER], [("refused", "rate_limited")],
               "refused: the pause the partition carried counts in the "
               "new owner's hourly limit (max_per_hour = 1)")
        time.sleep(1)
        tap.eq(ids(prcv.snapshot()), paused, "so no second pause was sent")
    finally:
        for d in ds:
            d.close()
        ops.close()
        prcv.close()
        mock.close()
    tap.done()


if __name__ == "__main__":
    main()
