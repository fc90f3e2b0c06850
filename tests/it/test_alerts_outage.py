"""test_alerts_outage: spooled alerts are never given up while their
receiver is down, a receiver that comes back is reached within seconds,
and a full spool drops info alerts first (counted), never harm.

Invented scenario: a bakery chain's four checkout experiments; three have
a clearly higher error share in the treatment (harm, severity warning),
one has equal shares with a margin (safe, severity info). Two receivers,
both down (nothing listens on their ports) while the alerts are raised:

  ops    default spool, max_attempts = 2, backoff_cap = 120s, probe = 1s.
         The outage (OUTAGE seconds) is far longer than 2 attempts take
         (the old give-up horizon), so the old code gave the alerts up;
         with a 120 s cap and no probe, the wait after the outage could
         be a minute or more. Every alert must arrive, within
         RETURN_WAIT seconds of the receiver's return, with nothing
         counted as failed.
  small  queue = 2: its spool is full with four alerts. The safe (info)
         alert is dropped and counted; all three harm alerts are kept
         (one beyond the bound, counted as overfull) and delivered.
  tiny   spool_bytes = 4096: the same, by bytes. The alert bodies here
         are about 1.9 kB, so two fit and three do not (checked below
         from the bodies ops received, so a change in their size shows).

Signatures are checked by _alertlib.Receiver (Python hmac, from the
Standard Webhooks specification).
"""
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, free_port, metrics, wait_for  # noqa: E402
from _alertlib import SECRET, Receiver, unit_records  # noqa: E402

OUTAGE = 15		# seconds both receivers stay down after the raise
RETURN_WAIT = 8		# seconds allowed after the return (probe = 1 s)

GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
margin = 0
action = alert

[guardrail slow]
metric = slow
test = proportion
harm = increase
margin = 0.05
action = alert
"""

HARMFUL = ("bake_a", "bake_b", "bake_c")
SAFE = "bake_safe"


def m_of(m, name, rcv):
    """One receiver's value; absent (as on a daemon without it): -1."""
    return m.get('%s{receiver="%s"}' % (name, rcv), -1.0)


def raised(reqs):
    """(experiment, alert) of every 2xx-answered raise."""
    out = set()
    for r in reqs:
        j = r["json"] or {}
        if r["status"] == 200 and j.get("type") == "stopcock.alert.raised":
            out.add((j.get("experiment"), j.get("alert")))
    return out


def main():
    tap = Tap()
    ops_port, small_port, tiny_port = free_port(), free_port(), free_port()
    extra = """
[webhook ops]
url = http://127.0.0.1:%d/hook
secret = %s
kinds = harm safe
timeout = 1s
max_attempts = 2
backoff_cap = 120s
probe = 1s

[webhook small]
url = http://127.0.0.1:%d/hook
secret = %s
kinds = harm safe
timeout = 1s
max_attempts = 2
backoff_cap = 120s
probe = 1s
queue = 2

[webhook tiny]
url = http://127.0.0.1:%d/hook
secret = %s
kinds = harm safe
timeout = 1s
backoff_cap = 120s
probe = 1s
spool_bytes = 4096
""" % (ops_port, SECRET, small_port, SECRET, tiny_port, SECRET)
    want = {(e, "harm") for e in HARMFUL} | {(SAFE, "safe")}
    ops = small = tiny = None
    with Daemon("alerts-outage", guardrails=GUARDRAILS, extra=extra,
                udp=False, unix=False, http=True) as d:
        for i, e in enumerate(HARMFUL):
            d.send_tcp(unit_records(e, "errors", [
                ("control", 3000, 0.02), ("treatment", 3000, 0.09)], 11 + i))
        d.send_tcp(unit_records(SAFE, "slow", [
            ("control", 3000, 0.10), ("treatment", 3000, 0.10)], 17))
        # Four alerts raised: ops holds them all; small dropped the info.
        tap.ok(wait_for(lambda: m_of(metrics(d), "stopcock_webhook_queued",
                                     "ops") == 4.0, 40),
               "ops: four alerts queued while the receiver is down",
               repr({k: v for k, v in metrics(d).items() if "webhook" in k}))
        time.sleep(OUTAGE)
        m = metrics(d)
        tap.eq((m_of(m, "stopcock_webhook_queued", "ops"),
                m_of(m, "stopcock_webhook_failed_total", "ops"),
                m_of(m, "stopcock_webhook_dropped_total", "ops")),
               (4.0, 0.0, 0.0),
               "ops: after the outage all four still queued, none given up")
        tap.ok(m_of(m, "stopcock_webhook_retries_total", "ops") > 2,
               "ops: retried past max_attempts = 2",
               repr(m_of(m, "stopcock_webhook_retries_total", "ops")))
        tap.ok(m_of(m, "stopcock_webhook_spool_bytes", "ops") > 0,
               "ops: the spool's bytes are in /metrics")
        spool = os.path.join(d.state, "spool", "ops")
        tap.eq(len([f for f in os.listdir(spool) if f.endswith(".json")]),
               4, "ops: four alerts on disk")
        tap.eq((m_of(m, "stopcock_webhook_queued", "small"),
                m_of(m, "stopcock_webhook_dropped_total", "small"),
                m_of(m, "stopcock_webhook_overfull_total", "small"),
                m_of(m, "stopcock_webhook_failed_total", "small")),
               (3.0, 1.0, 1.0, 0.0),
               "small: queue 2 full: the info alert dropped (counted), the "
               "three harms kept, one beyond the bound (counted)")

        tap.eq((m_of(m, "stopcock_webhook_queued", "tiny"),
                m_of(m, "stopcock_webhook_dropped_total", "tiny"),
                m_of(m, "stopcock_webhook_overfull_total", "tiny")),
               (3.0, 1.0, 1.0),
               "tiny: 4096 bytes full: the info alert dropped, the three "
               "harms kept, one beyond the bound")

        ops = Receiver(port=ops_port)
        small = Receiver(port=small_port)
        tiny = Receiver(port=tiny_port)
        ops.wait(lambda r: raised(r) >= want, RETURN_WAIT)
        tap.eq(raised(ops.snapshot()), want,
               "ops: every alert delivered within %d s of the return"
               % RETURN_WAIT)
        tap.eq([r["error"] for r in ops.snapshot()],
               [None] * len(ops.snapshot()), "ops: every signature verifies")
        hw = {(e, "harm") for e in HARMFUL}
        small.wait(lambda r: raised(r) >= hw, RETURN_WAIT)
        tap.eq(raised(small.snapshot()), hw,
               "small: the three harm alerts delivered, the info one not")
        tiny.wait(lambda r: raised(r) >= hw, RETURN_WAIT)
        tap.eq(raised(tiny.snapshot()), hw,
               "tiny: the three harm alerts delivered, the info one not")
        sizes = sorted(len(r["body"]) for r in ops.snapshot()
                       if r["status"] == 200)
        tap.ok(len(sizes) == 4 and sum(sizes[-2:]) <= 4096 <
               sum(sizes[:3]), "tiny's premise: two bodies fit in 4096 "
               "bytes, three do not", repr(sizes))
        tap.ok(wait_for(lambda: not [f for f in os.listdir(spool)
                                     if f.endswith(".json")], 5),
               "ops: the spool is empty after the 2xx answers")
        m = metrics(d)
        tap.eq((m_of(m, "stopcock_webhook_sent_total", "ops"),
                m_of(m, "stopcock_webhook_queued", "ops"),
                m_of(m, "stopcock_webhook_spool_bytes", "ops"),
                m_of(m, "stopcock_webhook_sent_total", "small")),
               (4.0, 0.0, 0.0, 3.0),
               "metrics: ops sent 4, nothing left; small sent 3")
        with open(d.logpath) as f:
            log = f.read()
        tap.ok("spool full, dropped" in log and "giving up" not in log,
               "log: the drop is logged, nothing was given up")
    for r in (ops, small, tiny):
        if r is not None:
            r.close()
    tap.done()


if __name__ == "__main__":
    main()
