"""test_alerts_pause: auto-pause from a real stopcockd into a real
redis-server and a real HTTP pause receiver, with every refusal audited.

Invented scenario: a grocery app's "basket" experiments, guardrail
"errors" (proportion, harm = increase, action = pause), pause_alpha left
at its default (a tenth of alpha), max_per_hour = 1. Fed in order:

  basket_a    control 2% errors, two treatments at 9%: the first pause
              finding pauses (Redis SET of it:paused:basket_a, PUBLISH on
              it:pauses, signed POST to the pause URL); the second arm's
              finding is refused: already paused this epoch.
  basket_srm  exposures skewed 30/70 against a 50/50 plan first (sample
              ratio mismatch), then harmful data: the pause is refused
              because SRM made the data untrustworthy; no Redis key.
  basket_b    harmful, but the hourly limit (1) is spent: refused.

Then a second daemon with dry_run = yes and allow_srm = yes: on a harmful
basket_dry the audit log says dry_run, an alert says what would have been
paused, and nothing reaches Redis or the pause URL; on basket_dry_srm the
SRM itself is the (dry-run) pause reason.

Every audit line is parsed as JSON; the pause POST's signature is checked
with Python's hmac/hashlib/base64 (_alertlib.verify), and the pause level
is recomputed here: pause_alpha = alpha / 10 (conf default), split over
the family (guardrails x treatment arms).
"""
import json
import os
import socket
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Redis, Tap, _Resp, wait_for  # noqa: E402
from _alertlib import (PAUSE_SECRET, SECRET, Receiver,  # noqa: E402
                       harmful_records, unit_records)

# The records come over unsigned TCP: trusted here, so auto-pause acts
# on them (test_daemon_auth.py covers the shipped default, untrusted).
TRUST_TCP = {"tcp_trusted": "yes"}

GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
margin = 0
action = pause
"""
ALPHA = 0.05	# _lib's generated [defaults]


def pause_conf(ops, prcv, dry_run):
    return """
[webhook ops]
url = %s
secret = %s

[pause]
url = %s
secret = %s
redis_key = it:paused:%%e
redis_channel = it:pauses
max_per_hour = 1
dry_run = %s
allow_srm = %s
""" % (ops.url, SECRET, prcv.url, PAUSE_SECRET, "yes" if dry_run else "no",
       "yes" if dry_run else "no")


def send_srm_first(d, lines, n):
    """The plan and the skewed exposures, a pause of record time, then
    the rest."""
    d.send_tcp(lines[:n])
    time.sleep(0.5)
    d.send_tcp(lines[n:])


def audit(d):
    path = os.path.join(d.state, "pause-audit.log")
    try:
        with open(path) as f:
            return [json.loads(line) for line in f if line.strip()]
    except FileNotFoundError:
        return []


def subscriber(port, channel):
    s = _Resp(port, timeout=0.5)
    s.command("SUBSCRIBE", channel)
    return s


def messages(sub, wait):
    """Published payloads read within `wait` seconds."""
    out = []
    end = time.time() + wait
    while time.time() < end:
        try:
            r = sub.reply()
        except socket.timeout:
            continue
        if isinstance(r, list) and r and r[0] == "message":
            out.append(r[2])
    return out


def main():
    tap = Tap()
    ops = Receiver()
    prcv = Receiver(secret=PAUSE_SECRET)
    with Redis("alerts-pause") as redis:
        sub = subscriber(redis.port, "it:pauses")
        with Daemon("alerts-pause", redis=redis, guardrails=GUARDRAILS,
                    extra=pause_conf(ops, prcv, False), udp=False,
                    unix=False, daemon_keys=TRUST_TCP) as d:
            # basket_a: two harmful treatments; the first pauses.
            d.send_tcp(unit_records("basket_a", "errors", [
                ("control", 2500, 0.02), ("t1", 2500, 0.09),
                ("t2", 2500, 0.09)], 11))
            lines = wait_for(lambda: [a for a in audit(d)
                                      if a["experiment"] == "basket_a"]
                             if len([a for a in audit(d) if a["experiment"]
                                     == "basket_a"]) >= 2 else None, 20)
            lines = lines or [a for a in audit(d)
                              if a["experiment"] == "basket_a"]
            tap.eq([(a["decision"], a["reason"]) for a in lines],
                   [("paused", "harm established at pause_alpha"),
                    ("refused", "already_paused_this_epoch")],
                   "basket_a: paused once, the second arm refused "
                   "(once per experiment and epoch)")
            first = lines[0] if lines else {}
            ev = first.get("evidence", {})
            level = ALPHA / 10 / 2	# pause_alpha default over a family of 2
            tap.ok(ev.get("p") is not None and ev["p"] <= level and
                   abs(ev.get("pause_alpha", 0) - level) < 1e-12 and
                   ev.get("family") == 2,
                   "audit: evidence p <= alpha/10/family = %g" % level,
                   repr(ev)[:400])
            tap.ok(ev.get("lower") is not None and
                   ev["lower"] <= ev["estimate"] <= ev["upper"] and
                   first.get("epoch") == 1 and
                   first.get("guardrail") == "errors" and
                   first.get("variant") in ("t1", "t2") and
                   isinstance(first.get("time"), float),
                   "audit: time, epoch, guardrail, variant, bounds")

            key = wait_for(lambda: redis.cmd("GET", "it:paused:basket_a"),
                           10)
            val = json.loads(key) if key else {}
            tap.ok(val.get("experiment") == "basket_a" and
                   val.get("epoch") == 1 and val.get("reason") and
                   val.get("evidence", {}).get("p", 1) <= level,
                   "Redis: it:paused:basket_a holds reason and evidence",
                   repr(key)[:300])
            msgs = messages(sub, 2)
            tap.eq([json.loads(m).get("experiment") for m in msgs],
                   ["basket_a"], "Redis: one message on it:pauses")
            got = prcv.wait(lambda r: r, 10)
            preqs = prcv.snapshot()
            tap.eq([(r["status"], r["error"]) for r in preqs],
                   [(200, None)],
                   "pause URL: one POST, signature verifies")
            pj = preqs[0]["json"] if got and preqs else {}
            tap.ok(pj.get("experiment") == "basket_a" and
                   pj.get("type") == "stopcock.pause" and
                   preqs[0]["headers"].get("webhook-id") == pj.get("id"),
                   "pause URL: body names the experiment; webhook-id = id")
            pa = ops.wait(lambda r: [x for x in r if x["json"] and
                                     x["json"].get("alert") == "pause"], 10)
            tap.ok(pa and pa[0]["json"]["experiment"] == "basket_a",
                   "ops: a pause alert tells people it was paused")

            # basket_srm: SRM first, so the pause must be refused. The
            # skewed exposures go first and alone: the SRM test reads
            # complete intervals of event time, so it needs record time
            # to pass beyond them before the harmful counts arrive.
            send_srm_first(d, unit_records("basket_srm", "errors", [
                ("control", 2500, 0.02), ("treatment", 2500, 0.09)], 12,
                skew={"control": 120, "treatment": 280}), 401)
            srm = wait_for(lambda: [a for a in audit(d)
                                    if a["experiment"] == "basket_srm"], 20)
            tap.eq([(a["decision"], a["reason"]) for a in srm or []],
                   [("refused", "untrusted")],
                   "basket_srm: pause refused, SRM made it untrustworthy")
            tap.ok(srm and srm[0]["evidence"].get("untrusted") is True,
                   "audit: the evidence says untrusted")
            tap.eq(redis.cmd("EXISTS", "it:paused:basket_srm"), 0,
                   "basket_srm: no Redis pause key")
            kinds = ops.wait(lambda r: {x["json"]["alert"] for x in r
                                        if x["json"] and x["json"].get(
                                            "experiment") == "basket_srm"}
                             >= {"srm", "harm"} and r, 10)
            tap.ok(kinds and "untrusted" not in {
                (x["json"] or {}).get("alert") for x in ops.snapshot()},
                   "basket_srm: srm and harm alerts sent; the untrusted "
                   "verdicts are part of the SRM alert, not a third",
                   repr([(x["json"] or {}).get("alert")
                         for x in ops.snapshot()]))

            # basket_b: harmful, but the hourly budget of 1 is spent.
            d.send_tcp(harmful_records("basket_b", "errors", 2500, 0.02,
                                       0.09, 13))
            rb = wait_for(lambda: [a for a in audit(d)
                                   if a["experiment"] == "basket_b"], 20)
            tap.eq([(a["decision"], a["reason"]) for a in rb or []],
                   [("refused", "rate_limited")],
                   "basket_b: refused by max_per_hour = 1")
            tap.eq(redis.cmd("EXISTS", "it:paused:basket_b"), 0,
                   "basket_b: no Redis pause key")
            tap.eq(messages(sub, 1), [], "Redis: no further pause messages")
            tap.eq(len(prcv.snapshot()), 1, "pause URL: no further POSTs")

        # dry run: a fresh daemon, same Redis.
        n_ops = len(ops.snapshot())
        with Daemon("alerts-pause-dry", redis=redis, guardrails=GUARDRAILS,
                    extra=pause_conf(ops, prcv, True), udp=False,
                    unix=False, daemon_keys=TRUST_TCP) as d:
            d.send_tcp(harmful_records("basket_dry", "errors", 2500, 0.02,
                                       0.09, 14))
            dry = wait_for(lambda: audit(d), 20)
            tap.eq([(a["experiment"], a["decision"]) for a in dry or []],
                   [("basket_dry", "dry_run")],
                   "dry run: the audit log says what would have paused")
            alert = ops.wait(lambda r: [x for x in r[n_ops:] if x["json"]
                                        and x["json"].get("alert") ==
                                        "pause_dry_run"], 10)
            tap.ok(alert and alert[0]["json"]["experiment"] == "basket_dry"
                   and alert[0]["error"] is None,
                   "dry run: a signed alert says what would have paused")
            time.sleep(1)
            tap.eq(redis.cmd("EXISTS", "it:paused:basket_dry"), 0,
                   "dry run: no Redis pause key")
            tap.eq(messages(sub, 0.5), [], "dry run: nothing published")
            # allow_srm = yes here: the SRM itself is a pause reason (dry
            # run again), the guardrail's later pause is still refused.
            send_srm_first(d, unit_records("basket_dry_srm", "errors", [
                ("control", 2500, 0.02), ("treatment", 2500, 0.09)], 15,
                skew={"control": 120, "treatment": 280}), 401)
            ds = wait_for(lambda: (lambda x: x if len(x) >= 2 else None)(
                [a for a in audit(d) if a["experiment"] ==
                 "basket_dry_srm"]), 20) or []
            tap.eq([(a["decision"], a["reason"], a["srm"]) for a in ds],
                   [("dry_run", "dry run: would have paused", True),
                    ("refused", "untrusted", False)],
                   "allow_srm: SRM would pause; the guardrail is refused")
            tap.eq(len(prcv.snapshot()), 1, "dry run: no pause POST")
        sub.close()
    ops.close()
    prcv.close()
    tap.done()


if __name__ == "__main__":
    main()
