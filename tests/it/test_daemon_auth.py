#!/usr/bin/python3
"""Authenticated inputs against the real daemon, real sockets and a real
redis-server (issue 12, "Forged records steer pauses").

The scenario is invented: a ferry operator tests a new boarding flow; its
guardrail "errors" (a proportion, harm = increase) pauses an experiment
when boarding errors rise, and "board_ms" (a mean) when boarding slows.

Part 1, the shipped defaults (no new key in the configuration, so the
same file runs on the code before authenticated inputs): TCP and UDP are
not trusted, the Unix socket is.
  - a forger on TCP sends error counts for ferry_a that would pause it;
  - a forger on UDP sends 40 boarding times of 1e9 ms for ferry_c;
  - a forger POSTs records over HTTP to the TCP port for ferry_d;
  - a forger sends 5,000 control exposures for ferry_b over TCP, to make
    its real harm look like a sample ratio mismatch; the real harm of
    ferry_b then comes over the (trusted) Unix socket.
  None of the forged experiments pauses, ferry_b does, and every forged
  record is counted as refused (untrusted_input).

Part 2, signed inputs: the Unix socket and UDP take only signed batches
(batch PRODUCER ID TS LENGTH v1,SIG + body), the Redis stream only signed
entries (fields producer, id, ts, signature beside records). Signatures
are made here with Python's hmac and hashlib, an implementation
independent of the daemon's (OpenSSL).
  - good batches around a bad signature, an unknown producer, a stale
    timestamp, a replayed id, a malformed header and unsigned records:
    exactly the good ones count (exposure tallies), each refusal once
    under its reason in /metrics;
  - harm from a signed producer pauses (ferry_p);
  - the records are counted per producer and per input;
  - after a restart a replayed batch is still refused;
  - the Unix socket gets unix_mode and unix_group at bind;
  - an experiment with accept_untrusted takes forged TCP records, counts
    them, and its pause is refused as untrusted_input.

Part 3, [kafka] signed (librdkafka's mock cluster, tests/tools/kafkamock):
the four values as message headers; a good batch, a bad signature, an
unsigned message and a good batch: exactly the good ones count.
"""
import base64
import hashlib
import hmac
import json
import os
import signal
import socket
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import (BUILD, OUT, Daemon, Redis, Tap, metrics,  # noqa: E402
                  wait_for)
from _alertlib import harmful_records  # noqa: E402

GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
margin = 0
action = pause

[guardrail board_ms]
metric = board_ms
test = mean
harm = increase
margin = 0
action = pause
"""

DECLARED = "".join("""
[experiment %s]
plan = control=50 treatment=50
""" % e for e in ("ferry_a", "ferry_b", "ferry_c", "ferry_d"))

KEY_OPS = b"ferry-ops-batch-signing-key-0001"
KEY_HARBOUR = b"harbour-desk-producer-key-0002"
KEY_STRANGER = b"not-configured-anywhere-key-03"


def whsec(key):
    return "whsec_" + base64.b64encode(key).decode()


def signature(key, mid, ts, body):
    """Standard Webhooks: v1, base64(HMAC-SHA256(key, id.ts.body))."""
    mac = hmac.new(key, ("%s.%d." % (mid, ts)).encode() + body,
                   hashlib.sha256).digest()
    return "v1," + base64.b64encode(mac).decode()


def frame(producer, key, mid, body, ts=None):
    ts = int(time.time()) if ts is None else ts
    if isinstance(body, list):
        body = "".join(line + "\n" for line in body).encode()
    head = "batch %s %s %d %d %s\n" % (producer, mid, ts, len(body),
                                      signature(key, mid, ts, body))
    return head.encode() + body


def frames(producer, key, prefix, lines, size=60000):
    """lines cut into signed batches of at most size bytes."""
    out, cur, n, k = [], [], 0, 0
    for line in lines:
        if n + len(line) + 1 > size:
            out.append(frame(producer, key, "%s-%d" % (prefix, k), cur))
            cur, n, k = [], 0, k + 1
        cur.append(line)
        n += len(line) + 1
    if cur:
        out.append(frame(producer, key, "%s-%d" % (prefix, k), cur))
    return out


def audit(d):
    try:
        with open(os.path.join(d.state, "pause-audit.log")) as f:
            return [json.loads(line) for line in f if line.strip()]
    except FileNotFoundError:
        return []


def decisions(d, exp):
    return [(a["decision"], a["reason"]) for a in audit(d)
            if a["experiment"] == exp]


def experiments(d):
    import http.client
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", "/api/experiments")
        body = json.loads(c.getresponse().read().decode())
    finally:
        c.close()
    return {e["id"]: e for e in body["experiments"]}


def get_json(d, path):
    import http.client
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        return json.loads(c.getresponse().read().decode())
    finally:
        c.close()


def tallies(d, exp):
    e = experiments(d).get(exp)
    if e is None:
        return None
    return {a["variant"]: a["exposures"] for a in e["arms"]}


def expose(exp, variant, n):
    return ["expose %s %s" % (exp, variant)] * n


def latencies(exp, seed):
    """Real-looking boarding times, then 40 forged ones of 1e9 ms."""
    import random
    rng = random.Random(seed)
    out = []
    for i in range(400):
        for arm in ("control", "treatment"):
            out.append("expose %s %s" % (exp, arm))
            v = 1e9 if arm == "treatment" and i % 10 == 0 else \
                rng.gauss(95, 8)
            out.append("observe %s %s board_ms %.6g" % (exp, arm, v))
    return out


def part_defaults(tap):
    d = Daemon("auth-defaults", guardrails=GUARDRAILS, extra=DECLARED,
               http=True)
    try:
        forged_a = harmful_records("ferry_a", "errors", 2500, 0.02, 0.09, 21)
        forged_a = [l for l in forged_a if not l.startswith("plan")]
        d.send_tcp(forged_a)
        forged_c = latencies("ferry_c", 22)
        d.send_udp(forged_c, per_datagram=40)
        forged_d = harmful_records("ferry_d", "errors", 2500, 0.02, 0.09, 23)
        forged_d = [l for l in forged_d if not l.startswith("plan")]
        body = "".join(l + "\n" for l in forged_d).encode()
        post = (b"POST /api/records HTTP/1.1\r\nHost: 127.0.0.1\r\n"
                b"Content-Type: text/plain\r\nContent-Length: %d\r\n\r\n"
                % len(body)) + body
        d.send_tcp(post)
        d.send_tcp(expose("ferry_b", "control", 5000))
        real_b = harmful_records("ferry_b", "errors", 2500, 0.02, 0.09, 24)
        real_b = [l for l in real_b if not l.startswith("plan")]
        d.send_unix(real_b)

        paused = wait_for(lambda: decisions(d, "ferry_b") or None, 30)
        tap.eq(paused, [("paused", "harm established at pause_alpha")],
               "defaults: real harm over the trusted unix socket pauses "
               "ferry_b despite 5,000 forged control exposures on TCP")
        time.sleep(2)	# the forged data had every chance to pause too
        for exp, how in (("ferry_a", "forged error counts over TCP"),
                         ("ferry_c", "40 forged 1e9 ms times over UDP"),
                         ("ferry_d", "records POSTed over HTTP to the TCP "
                          "port")):
            tap.eq(decisions(d, exp), [],
                   "defaults: %s do not pause %s" % (how, exp))
        t = {e: tallies(d, e) for e in ("ferry_a", "ferry_b", "ferry_c",
                                        "ferry_d")}
        tap.eq(t["ferry_a"], {"control": 0, "treatment": 0},
               "defaults: no forged TCP exposure reached ferry_a")
        tap.eq(t["ferry_c"], {"control": 0, "treatment": 0},
               "defaults: no forged UDP exposure reached ferry_c")
        tap.eq(t["ferry_b"], {"control": 2500, "treatment": 2500},
               "defaults: ferry_b holds the real exposures only")
        m = metrics(d)
        tcp = m.get('stopcock_rejected_total{source="tcp",reason='
                    '"untrusted_input"}')
        udp = m.get('stopcock_rejected_total{source="udp",reason='
                    '"untrusted_input"}')
        tap.eq(tcp, float(len(forged_a) + len(forged_d) + 5000),
               "defaults: every forged TCP record counted untrusted_input")
        tap.eq(udp, float(len(forged_c)),
               "defaults: every forged UDP record counted untrusted_input")
        tap.eq(m.get('stopcock_source_records_total{input="unix"}'),
               float(len(real_b)),
               "defaults: the unix records counted by their input")
        tap.eq(m.get('stopcock_source_records_total{input="tcp"}'), 0.0,
               "defaults: no TCP record applied")
        tap.eq([m.get('stopcock_input_trusted{input="%s"}' % i)
                for i in ("tcp", "udp", "unix")], [0.0, 0.0, 1.0],
               "defaults: only the unix socket is trusted")
    finally:
        d.close()


def part_signed(tap, redis):
    secret_file = None
    d = Daemon("auth-signed", redis=redis, guardrails=GUARDRAILS,
               http=True, start=False,
               daemon_keys={"unix_signed": "yes", "udp_signed": "yes",
                            "unix_mode": "0620",
                            "unix_group": str(os.getgid())},
               redis_keys={"signed": "yes", "start": "beginning"})
    secret_file = os.path.join(d.dir, "harbour.secrets")
    with open(secret_file, "w") as f:
        f.write("# rotated monthly\n%s\n" % whsec(KEY_HARBOUR))
    d.write_conf(d.conf_text + """
[producer ferry_ops]
secret = %s

[producer harbour]
secret_file = %s

[experiment ferry_open]
plan = control=50 treatment=50
accept_untrusted = yes
""" % (whsec(KEY_OPS), secret_file))
    d.start()
    try:
        st = os.stat(d.unix)
        tap.eq((oct(st.st_mode & 0o7777), st.st_gid),
               (oct(0o620), os.getgid()),
               "unix_mode and unix_group applied to the socket at bind")
        now = int(time.time())
        good1 = frame("ferry_ops", KEY_OPS, "ops-1",
                      ["plan ferry_s control=50 treatment=50"] +
                      expose("ferry_s", "control", 30) +
                      expose("ferry_s", "treatment", 20))
        stream = b"".join([
            good1,
            frame("ferry_ops", KEY_STRANGER, "ops-2",
                  expose("ferry_s", "control", 7)),		# bad signature
            frame("stranger", KEY_STRANGER, "x-1",
                  expose("ferry_s", "treatment", 5)),		# unknown
            frame("ferry_ops", KEY_OPS, "ops-3",
                  expose("ferry_s", "control", 3), ts=now - 1000),  # stale
            good1,						# replayed
            # malformed: its body is skipped up to the next header
            b"batch ferry_ops ops-4 17 zz v1,abc\n"
            b"expose ferry_s control\nexpose ferry_s control\n",
            frame("harbour", KEY_HARBOUR, "hb-1",
                  expose("ferry_s", "control", 10) +
                  expose("ferry_s", "treatment", 10)),
            b"expose ferry_s treatment\nexpose ferry_s treatment\n",  # unsigned
            b"\n",
            frame("ferry_ops", KEY_OPS, "ops-5",
                  expose("ferry_s", "control", 5)),
        ])
        d.send_unix(stream)
        tap.eq(tallies(d, "ferry_s"), {"control": 45, "treatment": 30},
               "signed unix: exactly the three good batches counted around "
               "six bad ones")
        m = metrics(d)
        want = {"bad_signature": 1, "unknown_producer": 1,
                "stale_timestamp": 1, "replayed": 1, "malformed_frame": 1,
                "unsigned": 1}
        got = {r: m.get('stopcock_batches_refused_total{source="unix",'
                        'reason="%s"}' % r) for r in want}
        tap.eq(got, {r: float(n) for r, n in want.items()},
               "signed unix: each refusal counted once under its reason")

        # UDP: one signed datagram, one unsigned
        s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        s.sendto(frame("ferry_ops", KEY_OPS, "ops-udp-1",
                       expose("ferry_s", "control", 4)), ("127.0.0.1", d.udp))
        s.sendto(b"expose ferry_s treatment\n" * 6, ("127.0.0.1", d.udp))
        s.close()
        # Redis: signed, bad signature, unsigned, one field missing
        body = "".join(l + "\n" for l in expose("ferry_s", "treatment",
                                                 5)).encode()
        ts = int(time.time())
        redis.xadd(d.stream, {"records": body, "producer": "harbour",
                              "id": "hb-redis-1", "ts": str(ts),
                              "signature": signature(KEY_HARBOUR,
                                                     "hb-redis-1", ts, body)})
        bad = "".join(l + "\n" for l in expose("ferry_s", "control",
                                                9)).encode()
        redis.xadd(d.stream, {"records": bad, "producer": "harbour",
                              "id": "hb-redis-2", "ts": str(ts),
                              "signature": signature(KEY_OPS, "hb-redis-2",
                                                     ts, bad)})
        redis.xadd(d.stream, {"records": bad})
        redis.xadd(d.stream, {"records": bad, "producer": "harbour",
                              "id": "hb-redis-3", "ts": str(ts)})
        want_t = {"control": 49, "treatment": 35}
        got_t = wait_for(lambda: tallies(d, "ferry_s") if tallies(
            d, "ferry_s") == want_t else None, 10)
        tap.eq(got_t or tallies(d, "ferry_s"), want_t,
               "signed udp and redis: the good batches counted, the bad not")
        m = metrics(d)
        tap.eq([m.get('stopcock_batches_refused_total{source="udp",'
                      'reason="unsigned"}'),
                m.get('stopcock_batches_refused_total{source="redis",'
                      'reason="bad_signature"}'),
                m.get('stopcock_batches_refused_total{source="redis",'
                      'reason="unsigned"}'),
                m.get('stopcock_batches_refused_total{source="redis",'
                      'reason="malformed_frame"}')], [1.0, 1.0, 1.0, 1.0],
               "signed udp and redis: refusals counted by input and reason")

        # harm from a signed producer pauses
        harm = harmful_records("ferry_p", "errors", 2500, 0.02, 0.09, 31)
        batches = frames("ferry_ops", KEY_OPS, "ops-harm", harm)
        d.send_unix(b"".join(batches))
        paused = wait_for(lambda: decisions(d, "ferry_p") or None, 30)
        tap.eq(paused, [("paused", "harm established at pause_alpha")],
               "signed: harm from a signed producer pauses ferry_p "
               "(%d batches)" % len(batches))

        # an experiment opened to untrusted inputs: its pause is refused
        forged = harmful_records("ferry_open", "errors", 2500, 0.02, 0.09, 32)
        d.send_tcp([l for l in forged if not l.startswith("plan")])
        refused = wait_for(lambda: decisions(d, "ferry_open") or None, 30)
        tap.eq(refused, [("refused", "untrusted_input")],
               "accept_untrusted: harm on untrusted records is not paused "
               "(audited as untrusted_input)")
        e = experiments(d).get("ferry_open", {})
        tap.eq(e.get("untrusted_records"), len(forged) - 1,
               "accept_untrusted: the untrusted records are counted")

        m = metrics(d)
        ops = 51 + 5 + 4 + len(harm)
        hb = 20 + 5
        tap.eq([m.get('stopcock_source_records_total{producer="ferry_ops"}'),
                m.get('stopcock_source_records_total{producer="harbour"}')],
               [float(ops), float(hb)],
               "signed: records counted per producer")
        tap.eq(m.get('stopcock_batches_total{producer="ferry_ops"}'),
               float(3 + len(batches)), "signed: batches per producer")
        health = get_json(d, "/api/health")
        tap.eq(health.get("sources", {}).get("producers", {}).get(
            "harbour", {}).get("records"), hb,
            "signed: /api/health shows the records per producer")

        # a key rotation by reload: the new secret, the old one still
        # accepted; the ids taken before are still refused
        KEY_NEW = b"ferry-ops-batch-signing-key-0002"
        d.write_conf(d.conf_text.replace(
            "secret = %s\n" % whsec(KEY_OPS),
            "secret = %s\nprevious_secret = %s\n" % (whsec(KEY_NEW),
                                                    whsec(KEY_OPS))))
        d.signal(signal.SIGHUP)
        tap.ok(wait_for(lambda: d.log_text().count(
            "reload: configuration in force") >= 1, 10),
            "rotation: the reload took the new secret")
        d.send_unix(b"".join([
            frame("ferry_ops", KEY_NEW, "ops-rot-1",
                  expose("ferry_s", "treatment", 2)),
            frame("ferry_ops", KEY_OPS, "ops-rot-2",
                  expose("ferry_s", "treatment", 1)),
            good1]))
        want_t = {"control": 49, "treatment": 38}
        tap.eq(tallies(d, "ferry_s"), want_t,
               "rotation: batches under the new and the previous secret "
               "count; a batch taken before the reload is still refused")

        # a restart keeps the replay floor: the same batch again is refused
        d.stop()
        d.start()
        d.send_unix(good1)
        m = metrics(d)
        tap.eq(m.get('stopcock_batches_refused_total{source="unix",'
                     'reason="replayed"}'), 3.0,
               "restart: a replayed batch is still refused")
        tap.eq(tallies(d, "ferry_s"), want_t,
               "restart: the tallies did not move")
    finally:
        d.close()


def part_kafka(tap):
    """[kafka] signed: messages carry the batch's values as headers."""
    log = open(os.path.join(OUT, "auth-kafkamock.log"), "w")
    mock = subprocess.Popen(
        [os.path.join(BUILD, "tests", "kafkamock"), "-b", "1", "-t", "rec:1",
         "-t", "st:1"], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
        stderr=log, text=True, bufsize=1)

    def cmd(line, payload=()):
        mock.stdin.write(line + "\n")
        for p in payload:
            mock.stdin.write(p + "\n")
        mock.stdin.flush()
        return mock.stdout.readline().strip()

    def send(lines, producer="-", key=None, mid="-", ts=None, sig=None):
        body = "\n".join(lines).encode()
        ts = int(time.time()) if ts is None else ts
        if key is not None:
            sig = signature(key, mid, ts, body)
        return cmd("hmsg ferry_k %d %s %s %s %s" % (
            len(lines), producer, mid, ts if producer != "-" else "-",
            sig or "-"), lines)

    bootstrap = mock.stdout.readline().split()[1]
    d = Daemon("auth-kafka", tcp=False, udp=False, unix=False, http=True,
               conf="", start=False)
    d.write_conf(
        "[defaults]\nalpha = 0.05\nplan_units = 2000\nlateness = 0\n"
        "srm_interval = 1ms\n" + GUARDRAILS +
        "\n[daemon]\nstate = %s\ntick = 200ms\ncheckpoint_every = 1s\n"
        "http = 127.0.0.1:%d\n" % (d.state, d.http) +
        "\n[kafka]\nbrokers = %s\ntopic = rec\nstate_topic = st\n"
        "group = auth\ncommit_every = 200ms\nsession_timeout = 6s\n"
        "signed = yes\n\n[producer ferry_ops]\nsecret = %s\n"
        % (bootstrap, whsec(KEY_OPS)))
    d.start()
    try:
        sent = [
            send(["plan ferry_k control=50 treatment=50"] +
                 expose("ferry_k", "control", 2), "ferry_ops", KEY_OPS,
                 "k-1"),
            send(expose("ferry_k", "treatment", 5), "ferry_ops",
                 KEY_STRANGER, "k-2"),			# bad signature
            send(expose("ferry_k", "control", 4)),		# unsigned
            send(expose("ferry_k", "treatment", 3), "ferry_ops", KEY_OPS,
                 "k-3"),
        ]
        tap.eq(sent, ["ok"] * 4, "kafka: four messages produced")
        want = {"control": 2, "treatment": 3}
        got = wait_for(lambda: tallies(d, "ferry_k") if tallies(
            d, "ferry_k") == want else None, 30)
        tap.eq(got or tallies(d, "ferry_k"), want,
               "kafka signed: the two good batches counted, the bad not")
        m = metrics(d)
        tap.eq([m.get('stopcock_batches_refused_total{source="kafka",'
                      'reason="%s"}' % r) for r in ("bad_signature",
                                                    "unsigned")],
               [1.0, 1.0], "kafka signed: refusals counted by reason")
    finally:
        d.close()
        cmd("quit")
        mock.wait(timeout=20)
        log.close()


def main():
    tap = Tap()
    part_defaults(tap)
    with Redis("auth") as redis:
        part_signed(tap, redis)
    part_kafka(tap)
    tap.done()


if __name__ == "__main__":
    main()
