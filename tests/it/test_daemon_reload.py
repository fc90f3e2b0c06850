"""test_daemon_reload: a reload keeps what it does not change (issue 13,
item 1), against a real stopcockd and a real webhook receiver.

Invented scenario: a bakery app tests a new order form ("treatment") whose
order errors and refunds both run at 8% against the control's 2%; the
guardrails "errors" and "refunds" (proportion, harm = increase) both find
harm. Then the operator widens the margin of "errors" and sends SIGHUP:

  - "refunds" is unchanged: its stopcock_test_verdict stays 1 (harm) on
    every scrape after the reload, and its p-value is the same;
  - "errors" starts its evidence afresh: the log says "test restarted"
    with the reason, the webhook receiver gets one stopcock.test.restarted
    event (signature checked by the receiver) naming the verdict it held;
  - the harm alert raised for "errors" is not withdrawn by the reload;
  - a second receiver whose kinds do not name "restarted" gets the harm
    alerts but not the event.
"""
import http.client
import json
import os
import random
import signal
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, metrics, wait_for  # noqa: E402
from _alertlib import SECRET, Receiver  # noqa: E402

EXP = "bakery_order_form"

GUARDRAILS = """
[guardrail errors]
metric = order_errors
test = proportion
harm = increase
margin = 0

[guardrail refunds]
metric = refunds
test = proportion
harm = increase
margin = 0
"""


def records(n_per_arm, seed):
    rng = random.Random(seed)
    out = ["plan %s control=50 treatment=50" % EXP]
    units = ["control", "treatment"] * n_per_arm
    rng.shuffle(units)
    for arm in units:
        p = 0.08 if arm == "treatment" else 0.02
        out.append("expose %s %s" % (EXP, arm))
        out.append("count %s %s order_errors %d 1" %
                   (EXP, arm, rng.random() < p))
        out.append("count %s %s refunds %d 1" % (EXP, arm, rng.random() < p))
    return out


def gauge(m, family, guardrail):
    """The sample of family for EXP's treatment under guardrail."""
    for k, v in m.items():
        if k.startswith(family + "{") and 'guardrail="%s"' % guardrail in k \
                and 'experiment="%s"' % EXP in k:
            return v
    return None


def main():
    tap = Tap()
    rcv = Receiver()
    quiet = Receiver()
    extra = ("[webhook ops]\nurl = %s\nsecret = %s\n"
             "[webhook pager]\nurl = %s\nsecret = %s\n"
             "kinds = harm srm pause resolved\n" %
             (rcv.url, SECRET, quiet.url, SECRET))
    with Daemon("reload-verdicts", guardrails=GUARDRAILS, extra=extra,
                udp=False, unix=False, http=True) as d:
        d.send_tcp(records(3000, 11))
        both = wait_for(lambda: gauge(metrics(d), "stopcock_test_verdict",
                                      "errors") == 1 and
                        gauge(metrics(d), "stopcock_test_verdict",
                              "refunds") == 1, 20)
        tap.ok(both, "both guardrails find harm before the reload")
        before = metrics(d)
        p_refunds = gauge(before, "stopcock_test_p_value", "refunds")
        alerts = rcv.wait(lambda r: [x for x in r if (x["json"] or {}).get(
            "type") == "stopcock.alert.raised"], 20) or []

        d.write_conf(d.conf_text.replace(
            "metric = order_errors\ntest = proportion\nharm = increase\n"
            "margin = 0\n",
            "metric = order_errors\ntest = proportion\nharm = increase\n"
            "margin = 0.5\n"))
        d.signal(signal.SIGHUP)
        tap.ok(wait_for(lambda: "reload: configuration in force" in
                        d.log_text(), 10), "SIGHUP: configuration in force")
        scrapes = [metrics(d) for _ in range(5)]
        tap.ok(all(gauge(m, "stopcock_test_verdict", "refunds") == 1
                   for m in scrapes),
               "refunds (unchanged): stopcock_test_verdict stays 1 on "
               "every scrape after the reload",
               [gauge(m, "stopcock_test_verdict", "refunds")
                for m in scrapes])
        tap.eq(gauge(scrapes[-1], "stopcock_test_p_value", "refunds"),
               p_refunds, "refunds: the same p-value after the reload")

        log = d.log_text().split("reload: reading")[-1]
        tap.ok("test restarted" in log and "guardrail=errors" in log and
               'reason="margin changed"' in log and "previous=harm" in log,
               "the log names the restarted test, why, and its verdict",
               [ln for ln in log.splitlines() if "restart" in ln])
        tap.ok("guardrail=refunds" not in log,
               "nothing restarts the unchanged guardrail")

        def restarted(reqs):
            return [r for r in reqs if (r["json"] or {}).get("type") ==
                    "stopcock.test.restarted"]
        ev = rcv.wait(restarted, 20) or []
        tap.eq(len(ev), 1, "one stopcock.test.restarted webhook event")
        body = ev[0]["json"] if ev else {}
        tap.eq((body.get("experiment"), body.get("guardrail"),
                body.get("variant"), body.get("previous"),
                body.get("verdict"), body.get("reason")),
               (EXP, "errors", "treatment", "harm", "undecided",
                "margin changed"),
               "event: which test, the verdict it held, why")
        tap.ok(ev and ev[0]["error"] is None and
               ev[0]["headers"].get("webhook-id") == body.get("id") and
               all(a["headers"].get("webhook-id") != body.get("id")
                   for a in alerts),
               "event: signed, with an id of its own (not an alert's)")
        view = d_get(d, "/api/experiments/" + EXP) or {}
        rs = {t.get("guardrail"): t.get("restarted")
              for t in view.get("tests", [])}
        tap.eq((rs.get("errors") or {}).get("reason"), "margin changed",
               "API: the errors test says it restarted, and why")
        tap.ok(rs.get("refunds") is None and
               (rs.get("errors") or {}).get("previous") == "harm",
               "API: what it held; nothing on the unchanged test", rs)
        raised = [a for a in (d_alerts(d) or [])
                  if a.get("guardrail") == "errors"]
        tap.ok(raised, "the harm alert for errors is still raised", raised)
        tap.ok(d.stop() == 0, "clean stop")
        types = [(r["json"] or {}).get("type") for r in quiet.requests]
        tap.ok("stopcock.alert.raised" in types and
               "stopcock.test.restarted" not in types,
               "pager (kinds without restarted): the alerts, not the event",
               types)
    rcv.close()
    quiet.close()
    tap.done()


def d_get(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        return json.loads(c.getresponse().read() or b"null")
    finally:
        c.close()


def d_alerts(d):
    doc = d_get(d, "/api/alerts")
    if isinstance(doc, dict):
        return doc.get("alerts")
    return doc


if __name__ == "__main__":
    main()
