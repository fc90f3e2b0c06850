"""test_alert_lifecycle: an alert's life from a real stopcockd to real
HTTP receivers: raised, acknowledged, resolved, with a severity, a
runbook, ids unique per incident, one alert per SRM, routing per
receiver, an Alertmanager that checks the API's schema, and alert lines
on stderr under -f.

Invented scenario: a seed shop's experiments, guardrails
  errors  proportion, harm = increase, action = alert (2% vs 9%: harm)
  slow    proportion, harm = increase, margin 0.05, unit = pct
          (10% vs 10%: safe)
Receivers:
  all       default kinds (everything but safe)
  harmonly  kinds = harm: the raise of a harm alert, nothing else
  good      kinds = safe resolved: safe news and its end
  am        an Alertmanager: POST /api/v2/alerts
The daemon runs with -f only (not -d), so what reaches its stderr is the
logger's info lines; before alerts were copied there, none was.

Checks, each against what the README documents (not the daemon's code):
  - harm on seeds_a: severity warning (harm that does not pause), the
    runbook, the id = "sc_" + SHA-256 (first 16 bytes, hex) of
    experiment, epoch, epoch start "%.3f", guardrail, variant, kind,
    NUL-separated; ack -> stopcock.alert.acknowledged (id + "_ack");
    close -> stopcock.alert.resolved (id + "_resolved", resolution
    closed); harmonly sees only the raise.
  - seeds_srm: skewed exposures then safe data: one srm alert, no
    "untrusted" alert, no safe alert (untrusted is never good news).
  - seeds_c: safe -> only good gets it, its summary gives the bound that
    rules harm out (no p-value) with the unit; a new epoch resolves it
    (resolution new_epoch).
  - seeds_d: harm, reset -> resolved (reset); the same harm again after
    the reset is a new incident with a new id.
  - Alertmanager: every POST is a JSON array of postable alerts (labels
    of strings with alertname, startsAt/endsAt RFC 3339); while raised,
    endsAt lies ahead; after the close, an endsAt not after the close.
    The schema is the Alertmanager API v2 "postableAlerts" (from memory
    of its OpenAPI file: labels required, annotations, startsAt,
    endsAt, generatorURL).
  - restart: the ids of open alerts are the same after it, nothing is
    sent again.
"""
import datetime
import hashlib
import http.client
import json
import os
import signal
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, wait_for  # noqa: E402
from _alertlib import SECRET, Receiver, unit_records  # noqa: E402

TOKEN = "it-lifecycle-token-0123456789"
RUNBOOK = "https://wiki.example.test/runbooks/stopcock"
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
unit = pct
action = alert
"""


def alert_id(experiment, epoch, start, guardrail, variant, kind):
    ident = b"\0".join(s.encode() for s in (
        experiment, str(epoch), "%.3f" % start, guardrail, variant, kind))
    return "sc_" + hashlib.sha256(ident).hexdigest()[:32]


def post(d, path, body=None):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("POST", path, body=json.dumps(body or {}),
                  headers={"Authorization": "Bearer " + TOKEN,
                           "Content-Type": "application/json"})
        r = c.getresponse()
        return r.status, json.loads(r.read() or b"{}")
    finally:
        c.close()


def get(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        return json.loads(c.getresponse().read())
    finally:
        c.close()


def bodies(reqs, **match):
    """JSON bodies matching; reqs is a Receiver or its request list (in
    a wait predicate, which holds the receiver's lock)."""
    if isinstance(reqs, Receiver):
        reqs = reqs.snapshot()
    return [r["json"] for r in reqs if isinstance(r["json"], dict)
            and all(r["json"].get(k) == v for k, v in match.items())]


def rfc3339(s):
    return datetime.datetime.strptime(s, "%Y-%m-%dT%H:%M:%S.%fZ").replace(
        tzinfo=datetime.timezone.utc).timestamp()


def am_schema_errors(doc):
    """What in one POST body breaks the postableAlerts schema."""
    errs = []
    if not isinstance(doc, list) or not doc:
        return ["not a non-empty array"]
    for a in doc:
        labels = a.get("labels")
        if not isinstance(labels, dict) or not labels or not all(
                isinstance(k, str) and isinstance(v, str)
                for k, v in labels.items()):
            errs.append("labels not a map of strings")
        elif "alertname" not in labels:
            errs.append("no alertname label")
        notes = a.get("annotations", {})
        if not isinstance(notes, dict) or not all(
                isinstance(v, str) for v in notes.values()):
            errs.append("annotations not a map of strings")
        for k in ("startsAt", "endsAt"):
            try:
                rfc3339(a[k])
            except (KeyError, TypeError, ValueError):
                errs.append("%s not RFC 3339" % k)
        if "generatorURL" in a and not a["generatorURL"].startswith(
                "http"):
            errs.append("generatorURL not a URL")
        extra = set(a) - {"labels", "annotations", "startsAt", "endsAt",
                          "generatorURL"}
        if extra:
            errs.append("unknown fields %r" % sorted(extra))
    return errs


def main():
    tap = Tap()
    allr = Receiver()
    harm = Receiver()
    good = Receiver()
    am = Receiver(secret=None)
    extra = """
[alerts]
runbook = %s

[alertmanager]
url = http://127.0.0.1:%d/
resend = 1s

[webhook all]
url = %s
secret = %s

[webhook harmonly]
url = %s
secret = %s
kinds = harm

[webhook good]
url = %s
secret = %s
kinds = safe resolved
""" % (RUNBOOK, am.port, allr.url, SECRET, harm.url, SECRET, good.url,
       SECRET)
    with Daemon("alert-lifecycle", guardrails=GUARDRAILS, extra=extra,
                udp=False, unix=False, http=True, args=("-f",),
                daemon_keys={"http_token": TOKEN}) as d:
        # seeds_a: harm.
        d.send_tcp(unit_records("seeds_a", "errors", [
            ("control", 3000, 0.02), ("treatment", 3000, 0.09)], 3))
        got = allr.wait(lambda r: bodies(r, experiment="seeds_a",
                                         alert="harm"), 30)
        b = got[0] if got else {}
        tap.eq((b.get("type"), b.get("severity"), b.get("runbook")),
               ("stopcock.alert.raised", "warning", RUNBOOK),
               "harm: raised, severity warning (does not pause), runbook")
        start = get(d, "/api/experiments/seeds_a")["epochs"][-1]["started"]
        tap.ok(b.get("epoch_start") == start and
               b.get("id") == alert_id("seeds_a", 1, start, "errors",
                                       "treatment", "harm"),
               "harm: id from the identity with the epoch's start",
               repr((b.get("id"), b.get("epoch_start"))))
        # Acknowledge, then close.
        st, _ = post(d, "/api/experiments/seeds_a/ack",
                     {"guardrail": "errors", "variant": "treatment"})
        tap.eq(st, 200, "ack accepted")
        acks = allr.wait(lambda r: bodies(r, type="stopcock.alert.acknowledged",
            experiment="seeds_a"), 10)
        tap.ok(acks and acks[0].get("id") == b.get("id") and
               [r for r in allr.snapshot() if r["headers"].get(
                   "webhook-id") == "%s_ack" % b.get("id")],
               "ack: an acknowledged event, webhook-id = id + _ack")
        time.sleep(1.5)	# at least one Alertmanager refresh (resend 1s)
        st, _ = post(d, "/api/experiments/seeds_a/close",
                     {"guardrail": "errors", "variant": "treatment"})
        closed_at = time.time()
        tap.eq(st, 200, "close accepted")
        res = allr.wait(lambda r: bodies(r, type="stopcock.alert.resolved", experiment="seeds_a"), 10)
        tap.ok(res and res[0].get("resolution") == "closed" and
               res[0].get("id") == b.get("id") and
               [r for r in allr.snapshot() if r["headers"].get(
                   "webhook-id") == "%s_resolved" % b.get("id")],
               "close: a resolved event, resolution closed",
               repr(res[:1])[:300])
        tap.ok(not [x for x in get(d, "/api/alerts").get("alerts", [])
                    if x.get("id") == b.get("id")],
               "close: the alert is no longer listed as open")

        # Alertmanager: schema, endsAt ahead, then at the close.
        wait_for(lambda: [r for r in am.snapshot()
                          if isinstance(r["json"], list) and
                          rfc3339(r["json"][0]["endsAt"]) <= closed_at + 1],
                 10)
        amreqs = am.snapshot()
        tap.ok(amreqs and all(r["path"] == "/api/v2/alerts"
                              for r in amreqs),
               "alertmanager: POSTs go to /api/v2/alerts",
               repr({r["path"] for r in amreqs}))
        errs = [e for r in amreqs for e in am_schema_errors(r["json"])]
        tap.eq(errs, [], "alertmanager: every POST is postableAlerts")
        mine = [(r["time"], a) for r in amreqs
                if isinstance(r["json"], list) for a in r["json"]
                if isinstance(a, dict) and
                a.get("labels", {}).get("alert_id") == b.get("id")]
        held = [(t, a) for t, a in mine if t < closed_at - 0.05]
        ended = [a for t, a in mine if t >= closed_at - 0.05]
        tap.ok(len(held) >= 2 and all(rfc3339(a["endsAt"]) > t + 1
                                      for t, a in held),
               "alertmanager: sent again while raised, endsAt ahead",
               repr([(t, a.get("endsAt")) for t, a in held])[:300])
        held = [a for t, a in held]
        tap.ok(held and held[0]["labels"].get("severity") == "warning" and
               held[0]["labels"].get("experiment") == "seeds_a" and
               held[0]["annotations"].get("runbook_url") == RUNBOOK,
               "alertmanager: severity and experiment labels, runbook",
               repr(held[:1])[:400])
        tap.ok(ended and all(rfc3339(a["endsAt"]) <= closed_at + 1
                             for a in ended),
               "alertmanager: after the close, endsAt is the close",
               repr([a.get("endsAt") for a in ended][-2:]))

        # seeds_srm: skewed exposures, then data that would be safe.
        lines = unit_records("seeds_srm", "slow", [
            ("control", 2000, 0.10), ("treatment", 2000, 0.10)], 5,
            skew={"control": 150, "treatment": 350})
        d.send_tcp(lines[:501])
        time.sleep(0.5)
        d.send_tcp(lines[501:])
        allr.wait(lambda r: bodies(r, experiment="seeds_srm",
                                   alert="srm"), 20)
        time.sleep(2)
        kinds = sorted(x.get("alert") for x in bodies(
            allr, experiment="seeds_srm", type="stopcock.alert.raised"))
        tap.eq(kinds, ["srm"], "srm: one alert, no second 'untrusted'")
        srm = bodies(allr, experiment="seeds_srm", alert="srm")
        tap.ok(srm and srm[0].get("severity") == "warning" and
               "untrustworthy" in srm[0].get("summary", ""),
               "srm: severity warning; it says the verdicts are "
               "untrustworthy", repr(srm[:1])[:300])
        tap.eq(bodies(good, experiment="seeds_srm"), [],
               "srm: no safe alert for an untrusted epoch")

        # seeds_c: safe, to the receiver that asked for it only.
        d.send_tcp(unit_records("seeds_c", "slow", [
            ("control", 3000, 0.10), ("treatment", 3000, 0.10)], 9))
        safe = good.wait(lambda r: bodies(r, experiment="seeds_c",
                                          alert="safe"), 30)
        s = safe[0] if safe else {}
        tap.eq(s.get("severity"), "info", "safe: severity info")
        summ = s.get("summary", "")
        tap.ok("at most" in summ and "p=" not in summ and "pct" in summ,
               "safe: the bound that rules harm out, with the unit, no "
               "p-value", summ)
        tap.eq(bodies(allr, experiment="seeds_c"), [],
               "safe: not sent to a receiver with the default kinds")
        st, _ = post(d, "/api/experiments/seeds_c/epoch")
        tap.eq(st, 200, "new epoch accepted")
        r = good.wait(lambda x: bodies(x, experiment="seeds_c",
                                       type="stopcock.alert.resolved"), 10)
        tap.ok(r and r[0].get("resolution") == "new_epoch",
               "new epoch: the safe alert is resolved", repr(r)[:300])

        # seeds_d: harm, reset, the same harm again.
        recs = unit_records("seeds_d", "errors", [
            ("control", 3000, 0.02), ("treatment", 3000, 0.09)], 4)
        d.send_tcp(recs)
        first = allr.wait(lambda x: bodies(x, experiment="seeds_d",
                                           type="stopcock.alert.raised"),
                          30)
        st, _ = post(d, "/api/experiments/seeds_d/reset")
        tap.eq(st, 200, "reset accepted")
        r = allr.wait(lambda x: bodies(x, experiment="seeds_d",
                                       type="stopcock.alert.resolved"), 10)
        tap.ok(r and r[0].get("resolution") == "reset",
               "reset: the harm alert is resolved", repr(r)[:200])
        time.sleep(0.1)
        d.send_tcp(recs[1:])	# the plan stands after a reset
        again = allr.wait(lambda x: len(bodies(
            x, experiment="seeds_d", type="stopcock.alert.raised")) >= 2,
            30)
        ids = [x.get("id") for x in bodies(allr, experiment="seeds_d",
                                           type="stopcock.alert.raised")]
        tap.ok(again and first and len(set(ids)) == 2,
               "reset: the same harm again is a new incident, a new id",
               repr(ids))

        # Routing: harmonly saw only raises of harm alerts.
        hk = {(x.get("type"), x.get("alert")) for x in bodies(harm)}
        tap.eq(hk, {("stopcock.alert.raised", "harm")},
               "harmonly: only raised harm alerts")

        # -f: alert lines on stderr (the log file holds stderr).
        log = d.log_text()
        tap.ok("alert raised id=%s" % b.get("id") in log and
               "alert resolved id=%s" % b.get("id") in log,
               "-f: raised and resolved alert lines on stderr")

        # [syslog] kinds defaults to all but safe: the stderr copy too.
        tap.ok(not [ln for ln in log.splitlines() if "alert raised" in ln
                    and "alert=safe" in ln] and "alert=srm" in log,
               "-f: safe news is not logged by default, SRM is")

        # A reload that changes a receiver's kinds says it waits for a
        # restart (receivers are built at start).
        d.write_conf(d.conf_text.replace("kinds = harm\n",
                                         "kinds = harm srm\n"))
        d.signal(signal.SIGHUP)
        tap.ok(wait_for(lambda: "reload: [webhook] sections changed" in
                        d.log_text(), 10),
               "reload: a changed [webhook] kinds is logged as waiting for "
               "a restart")

        # Restart: open alerts keep their ids, nothing is sent again.
        before = sorted(x["id"] for x in get(d, "/api/alerts")["alerts"])

        def settled():
            # every delivery answered: none left in a receiver's spool
            top = os.path.join(d.state, "spool")
            return not [f for r in os.listdir(top) if r != "@alertmanager"
                        for f in os.listdir(os.path.join(top, r))
                        if f.endswith(".json")]
        wait_for(settled, 10)
        n = len(allr.snapshot())
        tap.eq(d.stop(), 0, "daemon stops cleanly")
        d.start()
        after = sorted(x["id"] for x in get(d, "/api/alerts")["alerts"])
        tap.ok(before and before == after,
               "restart: the open alerts keep their ids", repr(after))
        time.sleep(1.5)
        tap.eq([r["json"].get("type") for r in allr.snapshot()[n:]], [],
               "restart: nothing sent again")
    for r in (allr, harm, good, am):
        r.close()
    tap.done()


if __name__ == "__main__":
    main()
