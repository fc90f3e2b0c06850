"""test_alerts_syslog: alert lines read from a real syslog socket.

stopcockd sends alerts with syslog(3), which writes to the datagram socket
/dev/log. To read them without a system logger and without touching the
host, the daemon runs in a private mount namespace (unshare -m, as root):
a test directory holding bind mounts of the few device nodes a process
needs and a symlink "log" to a unix datagram socket this test owns is
bind-mounted over /dev for the daemon only. The daemon is the real binary
using the real syslog(3); nothing in it knows about the test. Where mount
namespaces are not permitted (unprivileged containers), the test skips.

Invented scenario: a recipe app's "menu_v2" experiment with three count
guardrails fed by the same units:
  errors    2% vs 9%, action = pause (dry run here) -> harm, LOG_CRIT
  declines  3% vs 10%, action = alert               -> harm, LOG_ERR
  slow      10% vs 10%, margin 0.05                 -> safe, LOG_NOTICE
and the dry-run pause of "errors"                   -> LOG_WARNING.
Facility local3. The expected <PRI> numbers come from RFC 5424 sec. 6.2.1
(PRI = facility * 8 + severity; local3 = 19; crit 2, err 3, warning 4,
notice 5), not from the daemon's code. Reminders come every second until
an alert is acknowledged through the HTTP API.
"""
import http.client
import json
import os
import re
import sys
import time
import random

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, exposures  # noqa: E402
from _alertlib import SyslogSocket, namespace_wrap, unshare_ok  # noqa

TOKEN = "it-syslog-token-0123456789"
EXP = "menu_v2"
GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
action = pause

[guardrail declines]
metric = declines
test = proportion
harm = increase
action = alert

[guardrail slow]
metric = slow
test = proportion
harm = increase
margin = 0.05
action = alert
"""
EXTRA = """
[alerts]
remind = 1s

[pause]
dry_run = yes

[syslog]
ident = stopcockd-it
facility = local3
; safe news too (the default is every kind but safe); the retired news,
; not the restarted
kinds = harm safe srm pause pause_dry_run reminder acknowledged resolved retired
"""
LOCAL3 = 19
SEV = {"crit": 2, "err": 3, "warning": 4, "notice": 5}

LINE_RE = re.compile(r"^<(\d+)>([A-Z][a-z]{2} [ \d]\d \d\d:\d\d:\d\d) "
                     r"([^\[\s]+)\[(\d+)\]: (.*)$", re.S)


def records(seed, n):
    rng = random.Random(seed)
    out = ["plan %s control=50 treatment=50" % EXP]
    arms = ["control"] * n + ["treatment"] * n
    rng.shuffle(arms)
    share = {"errors": (0.02, 0.09), "declines": (0.03, 0.10),
             "slow": (0.10, 0.10)}
    for arm in arms:
        out.append("expose %s %s" % (EXP, arm))
        for metric, (pc, pt) in share.items():
            p = pc if arm == "control" else pt
            out.append("count %s %s %s %d 1" % (
                EXP, arm, metric, 1 if rng.random() < p else 0))
    return out


def parse(raw):
    """(pri, ident, pid, event, {key: value}) of one alert line."""
    m = LINE_RE.match(raw.rstrip("\n"))
    if not m:
        return None
    words = m.group(5).split(" ")
    if len(words) < 2 or words[0] != "alert":
        return None
    fields = dict(w.split("=", 1) for w in words[2:] if "=" in w)
    return int(m.group(1)), m.group(3), int(m.group(4)), words[1], fields


def post(d, path, body):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("POST", path, body=json.dumps(body),
                  headers={"Authorization": "Bearer " + TOKEN,
                           "Content-Type": "application/json"})
        r = c.getresponse()
        return r.status, r.read()
    finally:
        c.close()


def main():
    tap = Tap()
    if not unshare_ok():
        print("ok 1 # SKIP unshare -m not permitted here "
              "(needs root with CAP_SYS_ADMIN)")
        print("1..1")
        return
    d = Daemon("alerts-syslog", guardrails=GUARDRAILS, extra=EXTRA,
               udp=False, unix=False, http=True, start=False,
               daemon_keys={"http_token": TOKEN, "tcp_trusted": "yes"})
    log = SyslogSocket(os.path.join(d.dir, "log.sock"))
    namespace_wrap(d, syslog_socket=log.path)
    lines = records(21, 3000)
    sent = exposures(lines)
    with d:
        d.start()
        d.send_tcp(lines)

        def alerts():
            return [p for p in map(parse, log.lines) if p]

        def raised():
            return {p[4].get("guardrail") + "/" + p[4].get("alert"): p
                    for p in alerts() if p[3] == "raised"}
        want = {"errors/harm", "declines/harm", "slow/safe",
                "errors/pause_dry_run"}
        log.read(lambda l: want <= set(raised()), 20)
        got = raised()
        tap.ok(want <= set(got), "four alert lines reach the socket",
               "got: %r\nraw: %r" % (sorted(got), log.lines[:3]))
        for key, sev in (("errors/harm", "crit"), ("declines/harm", "err"),
                         ("slow/safe", "notice"),
                         ("errors/pause_dry_run", "warning")):
            pri = got[key][0] if key in got else None
            tap.eq(pri, LOCAL3 * 8 + SEV[sev],
                   "%s: priority local3.%s (RFC 5424 PRI)" % (key, sev))
        tap.ok(all(p[1] == "stopcockd-it" and p[2] == d.proc.pid
                   for p in got.values()),
               "ident and pid are the configured ident and the daemon",
               repr([(p[1], p[2]) for p in got.values()]) +
               " pid %d" % d.proc.pid)
        f = got.get("declines/harm", (0, 0, 0, 0, {}))[4]
        need = ["id", "experiment", "epoch", "guardrail", "variant",
                "control", "verdict", "estimate", "lower", "upper",
                "rel_estimate", "p", "alpha", "family", "untrusted",
                "exposures.control", "exposures.treatment", "n.control",
                "k.control", "n.treatment", "k.treatment", "link"]
        tap.eq([k for k in need if k not in f], [],
               "declines: every key=value field is on the line")
        try:
            lo, est, hi = (float(f[k]) for k in ("lower", "estimate",
                                                  "upper"))
            nums = lo <= est <= hi and 0 < lo and \
                float(f["p"]) <= float(f["alpha"])
        except (KeyError, ValueError):
            nums = False
        tap.ok(nums, "declines: lower <= estimate <= upper, p <= alpha",
               repr(f))
        tap.ok(f.get("experiment") == EXP and f.get("epoch") == "1" and
               f.get("verdict") == "harm" and f.get("untrusted") == "no" and
               f.get("family") == "3" and f.get("variant") == "treatment" and
               f.get("link", "").endswith("/?experiment=" + EXP),
               "declines: names, epoch, verdict, family 3 guardrails x 1 arm",
               repr(f))
        try:
            counts_ok = all(
                0 < int(f["exposures." + a]) <= sent[(EXP, a)] and
                0 <= float(f["k." + a]) <= float(f["n." + a]) <=
                sent[(EXP, a)] for a in ("control", "treatment"))
        except (KeyError, ValueError):
            counts_ok = False
        tap.ok(counts_ok, "declines: per-arm counts within what was sent",
               repr(f))

        # Reminders every second for harm; none for safe news.
        def reminders(guardrail):
            return [p for p in alerts() if p[3] == "reminder" and
                    p[4].get("guardrail") == guardrail and
                    p[4].get("alert") == "harm"]
        log.read(lambda l: len(reminders("declines")) >= 1 and
                 len(reminders("errors")) >= 1, 5)
        tap.ok(reminders("declines") and reminders("errors"),
               "reminders repeat the unacknowledged harm alerts")
        tap.ok(not [p for p in alerts() if p[3] == "reminder" and
                    p[4].get("alert") == "safe"], "no reminder for safe")
        tap.ok(reminders("declines") and
               reminders("declines")[0][4].get("id") ==
               got["declines/harm"][4].get("id"),
               "a reminder carries the alert's id")
        status, body = post(d, "/api/experiments/%s/ack" % EXP,
                            {"guardrail": "declines",
                             "variant": "treatment"})
        tap.eq(status, 200, "ack through the API")
        log.read(lambda l: "alert acknowledged" in l, 3)
        time.sleep(0.3)
        n_dec = len(reminders("declines"))
        n_err = len(reminders("errors"))
        log.read(lambda l: False, 2.5)
        tap.eq(len(reminders("declines")), n_dec,
               "no reminder after the acknowledgement")
        tap.ok(len(reminders("errors")) > n_err,
               "the other alert keeps reminding")
        status, _ = post(d, "/api/experiments/%s/ack" % EXP,
                         {"guardrail": "declines", "variant": "treatment"})
        tap.eq(status, 400, "a second ack finds nothing raised")

        # Retiring the experiment: one "event retired" line (kinds names
        # it), notice, with the webhooks' event id; its alerts resolve.
        def news(word):
            out = []
            for raw in log.lines:
                m = LINE_RE.match(raw.rstrip("\n"))
                w = m.group(5).split(" ") if m else []
                if w[:2] == ["event", word]:
                    out.append((int(m.group(1)), dict(
                        x.split("=", 1) for x in w[2:] if "=" in x)))
            return out
        status, _ = post(d, "/api/experiments/%s/retire" % EXP, {})
        tap.eq(status, 200, "retire through the API")
        log.read(lambda l: news("retired"), 5)
        ev = news("retired")
        tap.ok(len(ev) == 1 and ev[0][0] == LOCAL3 * 8 + SEV["notice"] and
               ev[0][1].get("experiment") == EXP and
               ev[0][1].get("reason") == "operator" and
               ev[0][1].get("id", "").startswith("sc_"),
               "one 'event retired' line: local3.notice, the experiment, "
               "why, an id", repr(ev))
        tap.ok(not news("restarted"), "nothing restarted")
    log.close()
    tap.done()


if __name__ == "__main__":
    main()
