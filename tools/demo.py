"""make demo: the invented "Larder & Lane" scenario through the real daemon.

Larder & Lane, a grocery-delivery app we made up, ramps a new checkout
("checkout-v2") from 90/10 to 50/50. The new flow makes the slowest
checkouts slower (p99 latency up about 15%) and is harmless elsewhere.
This script starts, on private loopback ports and in a temporary
directory: redis-server, a webhook receiver that checks every Standard
Webhooks signature, a syslog socket (when a private mount namespace is
allowed, so the real syslog(3) lines can be shown without touching the
host's logger) and stopcockd with the guardrails of conf/stopcock.conf.
It feeds the scenario through the Redis stream, then shows what an
on-call engineer would see: the webhook alert, the syslog line, the pause
key in Redis, `stopcock status`, and, from a terminal, the address of
the live page, open until Enter. Every process it started is stopped when
it ends, also on an error.

Usage: /usr/bin/python3 tools/demo.py BUILD_DIR
"""
import base64
import hashlib
import hmac
import json
import os
import re
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
BUILD = os.path.abspath(sys.argv[1] if len(sys.argv) > 1 else "build")
os.environ["STOPCOCK_BUILD"] = BUILD
os.environ.setdefault("STOPCOCK_TEST_OUT", os.path.join(BUILD, "demo"))
sys.path.insert(0, os.path.join(ROOT, "tests", "it"))
from _lib import Daemon, Redis, wait_for  # noqa: E402
from _alertlib import (Receiver, SyslogSocket, SECRET,  # noqa: E402
                       namespace_wrap, unshare_ok)

EXP = "checkout-v2"
TOKEN = "demo-token-larder-and-lane-0001"
BATCH = 500  # records per stream entry


def say(text=""):
    print(text, flush=True)


def guardrails():
    """The [guardrail ...] sections of the example configuration, with the
    p99 checkout guardrail set to pause, as the checkout team asked."""
    text = open(os.path.join(ROOT, "conf", "stopcock.conf")).read()
    out, keep = [], False
    for line in text.splitlines():
        if line.startswith("["):
            keep = line.startswith("[guardrail ")
        if keep:
            out.append(line)
    g = "\n".join(out) + "\n"
    return re.sub(r"(\[guardrail checkout_p99\][^\[]*?)action = alert",
                  r"\1action = pause", g, flags=re.S)


FEED_KEY = b"larder-and-lane-feed-key-0001"
FEED_SECRET = "whsec_" + base64.b64encode(FEED_KEY).decode()


def signed_entry(records, mid):
    """A Redis entry as a signed batch: Standard Webhooks HMAC-SHA256 of
    id "." ts "." records, fields beside the records."""
    ts = int(time.time())
    body = records.encode()
    mac = hmac.new(FEED_KEY, ("%s.%d." % (mid, ts)).encode() + body,
                   hashlib.sha256).digest()
    return {"records": body, "producer": "larder_feed", "id": mid,
            "ts": str(ts), "signature": "v1," + base64.b64encode(mac).decode()}


def fmt(x, pct=False):
    if x is None:
        return "n/a"
    return "%+.1f%%" % (100 * x) if pct else "%.4g" % x


def main():
    """Everything started is stopped on the way out, whatever happens in
    between (Redis() has already started its server: starting it again
    would leave the first one running)."""
    say("== stopcock demo: Larder & Lane ramps checkout-v2 ==")
    started = []
    try:
        return demo(started)
    finally:
        for thing in reversed(started):
            try:
                thing.stop() if hasattr(thing, "stop") else thing.close()
            except Exception as e:  # noqa: BLE001 - stop the rest
                say("stopping %r: %s" % (thing, e))


def demo(started):
    redis = Redis("demo")
    started.append(redis)
    hook = Receiver(secret=SECRET)
    started.append(hook)
    extra = """
[webhook oncall]
url = %s
secret = %s

[pause]
redis_key = larder:paused:%%e
redis_channel = larder:pauses
dry_run = no

[syslog]
ident = stopcockd
facility = local0

# The feed signs its entries: auto-pause acts only on trusted records.
[producer larder_feed]
secret = %s
""" % (hook.url, SECRET, FEED_SECRET)
    d = Daemon("demo", redis=redis, guardrails=guardrails(), extra=extra,
               http=True, udp=False, unix=False, start=False,
               daemon_keys={"http_token": TOKEN, "tick": "500ms",
                            "checkpoint_every": "1s"},
               redis_keys={"signed": "yes"})
    d.write_conf(d.conf_text.replace("plan_units = 2000",
                                     "plan_units = 20000") +
                 "\n# links in alerts point at this demo's page\n")
    d.write_conf(d.conf_text.replace(
        "[daemon]\n", "[daemon]\npublic_url = http://127.0.0.1:%d\n"
        % d.http, 1))
    syslog = None
    if os.geteuid() == 0 and unshare_ok():
        syslog = SyslogSocket(os.path.join(d.dir, "log.sock"))
        namespace_wrap(d, syslog_socket=syslog.path)
    started.append(d)
    d.start()
    url = "http://127.0.0.1:%d" % d.http
    say("redis-server on port %d, stopcockd on %s" % (redis.port, url))

    say("generating the scenario (stopcock generate --scenario demo) ...")
    gen = subprocess.run([os.path.join(BUILD, "stopcock"), "generate",
                          "--scenario", "demo", "-c",
                          os.path.join(ROOT, "conf", "stopcock.conf")],
                         capture_output=True, text=True, check=True)
    lines = gen.stdout.splitlines()
    say("feeding %d records through the Redis stream %s in entries of %d"
        % (len(lines), d.stream, BATCH))
    for i in range(0, len(lines), BATCH):
        redis.xadd(d.stream, signed_entry("\n".join(lines[i:i + BATCH]),
                                          "feed-%d" % i))

    def api(path):
        out = subprocess.run(["curl", "-sf", url + path],
                             capture_output=True, text=True)
        return json.loads(out.stdout) if out.returncode == 0 else None

    def applied():
        h = api("/api/experiments/" + EXP)
        if not h:
            return None
        n = sum(a["exposures"] for a in h["arms"])
        return h if n > 0 and redis.xpending(d.stream, d.group)[0] == 0 \
            else None
    wait_for(applied, 60, 0.2)
    hit = hook.wait(lambda rs: [r for r in rs if r["json"] and
                                r["json"].get("verdict") == "harm"], 30)
    say()
    if hit:
        a = hit[0]["json"]
        say("webhook alert received (signature %s):"
            % ("valid" if hit[0]["error"] is None else hit[0]["error"]))
        say("  %s" % a.get("summary", ""))
        say("  experiment=%s guardrail=%s variant=%s verdict=%s"
            % (a["experiment"], a["guardrail"], a["variant"], a["verdict"]))
        say("  estimate=%s (%s) bounds [%s, %s] (%s to %s) p=%s alpha=%s "
            "family=%s" % (fmt(a["estimate"]), fmt(a["rel_estimate"], 1),
                           fmt(a["lower"]), fmt(a["upper"]),
                           fmt(a["rel_lower"], 1), fmt(a["rel_upper"], 1),
                           fmt(a["p"]), fmt(a["alpha"]), a["family"]))
        say("  arms: " + ", ".join("%s n=%d value=%s" % (
            x["variant"], x["n"] or 0, fmt(x["value"])) for x in a["arms"]))
        say("  link: %s" % a.get("link", ""))
    else:
        say("no harm alert reached the webhook receiver (see %s)"
            % d.logpath)
    if syslog is not None:
        got = syslog.read(lambda l: "verdict=harm" in l, 10)
        say()
        say("syslog line:" if got else "no syslog line seen")
        for line in got[:1]:
            say("  " + line.strip())
    else:
        say("(syslog lines go to the system log: no private namespace here)")
    key = "larder:paused:" + EXP
    val = wait_for(lambda: redis.cmd("GET", key), 10, 0.2)
    say()
    say("Redis pause key %s = %s" % (key, val if val else "(unset)"))
    say()
    say("stopcock status --url %s" % url)
    subprocess.run([os.path.join(BUILD, "stopcock"), "status", "--url",
                    url])
    say()
    if sys.stdin.isatty():
        # The page lives as long as the demo does: say so.
        say("live page: %s/?experiment=%s" % (url, EXP))
        try:
            input("press Enter to stop the demo (and its page) ")
        except (EOFError, KeyboardInterrupt):
            pass
    else:
        say("(not a terminal: the demo stops now; run it from a terminal "
            "to keep its page open)")
    return 0 if hit else 1


if __name__ == "__main__":
    sys.exit(main())
