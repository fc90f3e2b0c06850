"""test_alerts_webhook: signed webhooks from a real stopcockd to real HTTP
receivers (Python's http.server), with retries, refusals and a restart.

Invented scenario: a pantry app tests a new "treatment" checkout whose
server error share is 8% against the control's 2%; the guardrail "errors"
(proportion, harm = increase) must alert. Three receivers listen:

  ops     answers 500, 500, then 200: the alert must arrive exactly once,
          after two retries, with the same webhook-id on every attempt.
  strict  answers 400 to everything: one attempt per alert, never retried.
  late    is down (nothing listens on its port) while the alert is raised;
          the daemon is stopped, the receiver comes up, the daemon starts
          again on the same state: the spooled alert arrives, once.

Every request's Standard Webhooks signature is checked by the receiver
with Python's hmac/hashlib/base64 (_alertlib.verify, written from the
specification, independent of the daemon's OpenSSL code). The alert id is
recomputed here from its documented identity (SHA-256 of experiment,
epoch, the epoch's start as "%.3f" (read from the API), guardrail,
variant and kind, NUL-separated).
"""
import hashlib
import http.client
import json
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, free_port, metrics, wait_for  # noqa: E402
from _alertlib import (SECRET, Receiver, harmful_records,  # noqa: E402
                       verify)

GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
margin = 0
action = alert
"""

EXP = "pantry_checkout"


def alert_id(experiment, epoch, start, guardrail, variant, kind):
    ident = b"\0".join(s.encode() for s in (
        experiment, str(epoch), "%.3f" % start, guardrail, variant, kind))
    return "sc_" + hashlib.sha256(ident).hexdigest()[:32]


def epoch_start(d, experiment):
    """The current epoch's start (record time), from the API."""
    e = get_json(d, "/api/experiments/" + experiment)
    return e["epochs"][-1]["started"]


def get_json(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        return json.loads(c.getresponse().read())
    finally:
        c.close()


def main():
    tap = Tap()
    ops = Receiver(script=[500, 500])
    strict = Receiver(default=400)
    late_port = free_port()
    late_url = "http://127.0.0.1:%d/hook" % late_port
    extra = """
[webhook ops]
url = %s
secret = %s
timeout = 2s
max_attempts = 8

[webhook strict]
url = %s
secret = %s

[webhook late]
url = %s
secret = %s
max_attempts = 100
""" % (ops.url, SECRET, strict.url, SECRET, late_url, SECRET)
    late = None
    with Daemon("alerts-webhook", guardrails=GUARDRAILS, extra=extra,
                udp=False, unix=False, http=True) as d:
        d.send_tcp(harmful_records(EXP, "errors", 3000, 0.02, 0.08, 7))
        want_id = alert_id(EXP, 1, epoch_start(d, EXP), "errors",
                           "treatment", "harm")

        def delivered(reqs):
            return [r for r in reqs if r["status"] == 200]
        got = ops.wait(delivered, 30)
        reqs = ops.snapshot()
        tap.ok(got, "ops: the alert was delivered after the 500s",
               "requests: %r" % [(r["status"], r["headers"].get(
                   "webhook-id")) for r in reqs])
        tap.eq([r["status"] for r in reqs], [500, 500, 200],
               "ops: 500, 500, then 200 (two retries, one delivery)")
        ids = [r["headers"].get("webhook-id") for r in reqs]
        tap.eq(ids, [want_id] * 3,
               "ops: same webhook-id on every attempt, from the identity")
        tap.eq([r["error"] for r in reqs], [None] * len(reqs),
               "ops: every signature verifies with the shared secret")
        tap.ok(all(r["body"] == reqs[0]["body"] for r in reqs),
               "ops: the body is the same bytes on every attempt")
        tap.ok(all(r["headers"].get("content-type") == "application/json"
                   for r in reqs), "ops: Content-Type application/json")
        # A tampered body must not verify: the check above can fail.
        r0 = reqs[-1]
        tap.ok(verify(SECRET, r0["headers"], r0["body"] + b" ") is not None,
               "receiver's verification rejects a changed body")

        body = r0["json"] or {}
        tap.eq((body.get("id"), body.get("type"), body.get("alert")),
               (want_id, "stopcock.alert.raised", "harm"),
               "body: id, type and kind")
        tap.eq((body.get("experiment"), body.get("epoch"),
                body.get("guardrail"), body.get("variant"),
                body.get("control"), body.get("verdict")),
               (EXP, 1, "errors", "treatment", "control", "harm"),
               "body: experiment, epoch, guardrail, arms, verdict")
        lo, est, hi = body.get("lower"), body.get("estimate"), \
            body.get("upper")
        tap.ok(None not in (lo, est, hi) and 0 < lo <= est <= hi,
               "body: lower <= estimate <= upper, bound above zero",
               repr((lo, est, hi)))
        tap.ok(body.get("rel_estimate") is not None and
               body.get("rel_lower") is not None and
               body["rel_lower"] > 0, "body: relative effect and bound")
        tap.ok(isinstance(body.get("p"), float) and
               body["p"] <= body.get("alpha", 0) and
               body.get("family") == 1,
               "body: always-valid p at most alpha (family of one test)",
               repr((body.get("p"), body.get("alpha"),
                     body.get("family"))))
        arms = {a["variant"]: a for a in body.get("arms", [])}
        tap.ok(set(arms) == {"control", "treatment"} and
               all(a["n"] > 0 and a["exposures"] > 0 and
                   0 <= a["k"] <= a["n"] for a in arms.values()) and
               arms["treatment"]["k"] / arms["treatment"]["n"] >
               arms["control"]["k"] / arms["control"]["n"],
               "body: per-arm counts, treatment's error share higher",
               repr(arms))
        tap.ok(body.get("untrusted") is False and
               isinstance(body.get("first_seen"), (int, float)) and
               abs(body["first_seen"] - time.time()) < 120,
               "body: untrusted flag and first_seen")
        tap.ok(isinstance(body.get("link"), str) and
               body["link"].endswith("/?experiment=" + EXP),
               "body: link to the experiment's page", body.get("link"))
        tap.ok(isinstance(body.get("summary"), str) and
               "errors" in body["summary"] and EXP in body["summary"],
               "body: a human summary line", body.get("summary"))

        # strict answered 400: one attempt, and none after a pause.
        time.sleep(3)
        sreqs = strict.snapshot()
        tap.eq([(r["status"], r["headers"].get("webhook-id"))
                for r in sreqs], [(400, want_id)],
               "strict: a 400 is not retried")
        tap.eq(len(ops.snapshot()), 3, "ops: nothing sent after the 200")
        m = metrics(d)
        tap.eq((m.get('stopcock_webhook_sent_total{receiver="ops"}'),
                m.get('stopcock_webhook_retries_total{receiver="ops"}'),
                m.get('stopcock_webhook_failed_total{receiver="strict"}'),
                m.get('stopcock_webhook_retries_total{receiver="strict"}')),
               (1.0, 2.0, 1.0, 0.0),
               "metrics: ops sent 1 after 2 retries; strict failed 1")
        tap.ok(m.get('stopcock_webhook_retries_total{receiver="late"}', 0)
               >= 1 and
               m.get('stopcock_webhook_queued{receiver="late"}') == 1.0,
               "metrics: late is retrying one queued alert",
               repr({k: v for k, v in m.items() if "late" in k}))
        # The harm went through the dispatcher's queue: every finding
        # queued was handed on (GET drains it first), none was lost.
        tap.ok(m.get("stopcock_dispatch_queued_total", 0) >= 1 and
               m.get("stopcock_dispatch_handled_total") ==
               m.get("stopcock_dispatch_queued_total") and
               (m.get("stopcock_dispatch_queue"),
                m.get("stopcock_dispatch_dropped_total"),
                m.get("stopcock_dispatch_overflow_total")) ==
               (0.0, 0.0, 0.0),
               "metrics: the dispatcher handed on every finding it queued",
               repr({k: v for k, v in m.items() if "dispatch" in k}))
        spool = os.path.join(d.state, "spool", "late")
        files = [f for f in os.listdir(spool) if f.endswith(".json")]
        tap.eq(len(files), 1, "late: the alert is spooled to disk")
        if files:
            with open(os.path.join(spool, files[0])) as f:
                tap.eq(json.load(f).get("id"), want_id,
                       "late: the spool file holds the alert")

        tap.eq(d.stop(), 0, "daemon stops cleanly while late is down")
        late = Receiver(port=late_port)
        d.start()
        got = late.wait(delivered, 20)
        lreqs = late.snapshot()
        tap.eq([(r["status"], r["headers"].get("webhook-id"), r["error"])
                for r in lreqs], [(200, want_id, None)],
               "late: after the restart the spooled alert arrives once, "
               "signed")
        tap.ok(lreqs and lreqs[0]["json"] and
               lreqs[0]["json"].get("id") == want_id,
               "late: its body is the alert")
        tap.ok(wait_for(lambda: not [f for f in os.listdir(spool)
                                     if f.endswith(".json")], 5),
               "late: the spool file is removed after the 2xx")
        alerts = get_json(d, "/api/alerts").get("alerts", [])
        tap.ok([a for a in alerts if a.get("id") == want_id and
                a.get("state") == "raised"],
               "the raised alert survived the restart (checkpoint)",
               repr(alerts)[:500])
        time.sleep(1)
        tap.eq(len(ops.snapshot()), 3,
               "ops: the restart did not page again")
        tap.eq(len(strict.snapshot()), 1,
               "strict: the restart did not page again")
    for r in (ops, strict, late):
        if r is not None:
            r.close()
    tap.done()


if __name__ == "__main__":
    main()
