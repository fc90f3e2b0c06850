"""test_alert_upgrade: a checkpoint written before alert ids held the
epoch's start (and before alerts had a severity or could be resolved)
still restores: its raised alert keeps its old id, is not paged again,
gets a severity from its syslog priority, and then lives on (an operator
can close it: a resolved event with the old id).

The old form is built here from the documented old identity: "sc_" and
the first 16 bytes of SHA-256, in hex, over experiment, epoch, guardrail,
variant and kind, NUL-separated; the entry loses its epoch_start and
severity keys. Invented scenario: a tea shop's "steep_v2" checkout whose
errors rise from 2% to 9%.
"""
import hashlib
import http.client
import json
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import (Daemon, Tap, checkpoint_read,  # noqa: E402
                  checkpoint_write_raw, wait_for)
from _alertlib import SECRET, Receiver, harmful_records  # noqa: E402

TOKEN = "it-upgrade-token-0123456789"
GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
margin = 0
action = alert
"""
EXP = "steep_v2"


def old_id(experiment, epoch, guardrail, variant, kind):
    ident = b"\0".join(s.encode() for s in
                       (experiment, str(epoch), guardrail, variant, kind))
    return "sc_" + hashlib.sha256(ident).hexdigest()[:32]


def api(d, method, path, body=None):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request(method, path, body=json.dumps(body) if body else None,
                  headers={"Authorization": "Bearer " + TOKEN,
                           "Content-Type": "application/json"})
        r = c.getresponse()
        return r.status, json.loads(r.read() or b"{}")
    finally:
        c.close()


def main():
    tap = Tap()
    hook = Receiver()
    extra = "[webhook ops]\nurl = %s\nsecret = %s\n" % (hook.url, SECRET)
    with Daemon("alert-upgrade", guardrails=GUARDRAILS, extra=extra,
                udp=False, unix=False, http=True,
                daemon_keys={"http_token": TOKEN}) as d:
        d.send_tcp(harmful_records(EXP, "errors", 3000, 0.02, 0.09, 11))
        got = hook.wait(lambda r: [x for x in r if x["json"] and
                                   x["json"].get("alert") == "harm"], 30)
        tap.ok(got, "the harm alert is raised")
        # Delivered means answered: a stop before the 2xx reaches the
        # daemon leaves it spooled, and it is sent again (same id).
        spool = os.path.join(d.state, "spool", "ops")
        wait_for(lambda: not [f for f in os.listdir(spool)
                              if f.endswith(".json")], 10)
        tap.eq(d.stop(), 0, "daemon stops cleanly (final checkpoint)")

        path = os.path.join(d.state, "checkpoint")
        ck = checkpoint_read(path)
        legacy = old_id(EXP, 1, "errors", "treatment", "harm")
        entries = ck["alerts"]["alerts"]
        for e in entries:
            if e["alert"] == "harm":
                e["id"] = legacy
                e["body"]["id"] = legacy
                e.pop("epoch_start", None)
                e["body"].pop("severity", None)
            e.pop("severity", None)
        checkpoint_write_raw(path, json.dumps(ck).encode())
        n = len(hook.snapshot())

        d.start()
        st, alerts = api(d, "GET", "/api/alerts")
        mine = [a for a in alerts.get("alerts", []) if a.get("id") == legacy]
        tap.ok(st == 200 and mine and mine[0].get("state") == "raised",
               "the old alert is restored under its old id",
               repr(alerts)[:400])
        time.sleep(1)
        tap.eq([(r["json"] or {}).get("type") for r in hook.snapshot()[n:]],
               [], "and not paged again")
        st, _ = api(d, "POST", "/api/experiments/%s/close" % EXP,
                    {"guardrail": "errors", "variant": "treatment"})
        tap.eq(st, 200, "an operator closes it")
        res = hook.wait(lambda r: [x for x in r if x["json"] and x["json"].get(
            "type") == "stopcock.alert.resolved"], 10)
        tap.ok(res and res[0]["json"].get("id") == legacy and
               res[0]["headers"].get("webhook-id") == legacy + "_resolved"
               and res[0]["json"].get("resolution") == "closed",
               "a resolved event under the old id", repr(res)[:300])
        tap.eq(d.stop(), 0, "and the new state is saved")
        ck = checkpoint_read(path)
        e = [x for x in ck["alerts"]["alerts"] if x["id"] == legacy]
        tap.ok(e and e[0].get("state") == "resolved" and
               e[0].get("severity") == "warning",
               "saved resolved, severity warning (from its priority)",
               repr(e)[:300])
    hook.close()
    tap.done()


if __name__ == "__main__":
    main()
