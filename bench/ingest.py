"""Daemon ingest rates for `make bench` (called by bench/run.sh).

    /usr/bin/python3 bench/ingest.py BUILD RECORDS_FILE CONF REDIS_RECORDS

Prints one JSON object:
  tcp:   stopcockd reading RECORDS_FILE from one TCP connection on
         loopback (the client uses sendfile, so it is not the bottleneck);
         the clock runs from the first byte sent until the daemon's
         /metrics counts every line.
  tcp_signed: RECORDS_FILE again, as signed batches (frame.h,
         bodies of at most 60000 bytes, HMAC-SHA256 made here beforehand
         with Python's hmac) on one TCP connection to a daemon with
         tcp_signed = yes: what verifying costs against plain TCP.
  redis: the first REDIS_RECORDS records as entries of BATCH records
         each. The reference is redis-server accepting exactly these
         entries: XADD of each, pipelined on one connection by this
         script's client (the commands encoded before the clock starts),
         timed from the first byte sent to the last reply; that preload
         is the stream the daemon then reads. stopcockd, started on the
         backlog behind a consumer group, is timed from its start until
         /metrics counts every line (one connection too). ratio = daemon
         records/s over XADD records/s. redis-benchmark's XADD rate (8
         clients, pipelined, one entry repeated) is reported beside it
         for reference only: another client and another payload.
  redis_ha: the same with [redis] ha = yes (reads fenced by the lease
         token, the checkpoint in Redis), beside the plain Redis rate.
Everything runs on private loopback ports in temporary directories
(tests/it/_lib.py starts and stops redis-server and stopcockd).
"""
import base64
import csv
import hashlib
import hmac
import io
import json
import os
import re
import socket
import subprocess
import sys
import time
import urllib.request

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BUILD, RECORDS, CONF = sys.argv[1], sys.argv[2], sys.argv[3]
REDIS_RECORDS = int(sys.argv[4])
os.environ["STOPCOCK_BUILD"] = BUILD
os.environ.setdefault("STOPCOCK_TEST_OUT", os.path.join(BUILD, "bench-out"))
sys.path.insert(0, os.path.join(ROOT, "tests", "it"))
from _lib import Daemon, Redis, _Resp  # noqa: E402

BATCH = 100		# records per Redis stream entry
TIMEOUT = 600

with open(CONF) as f:
    base_conf = f.read()


def metric(port, name, source):
    body = urllib.request.urlopen("http://127.0.0.1:%d/metrics" % port,
                                  timeout=10).read().decode()
    m = re.search(r'^%s\{source="%s"\} (\d+)' % (name, source), body, re.M)
    return int(m.group(1)) if m else 0


def wait_lines(d, source, want, t0):
    """Seconds from t0 until the daemon has read want lines."""
    deadline = time.time() + TIMEOUT
    while time.time() < deadline:
        if d.proc.poll() is not None:
            raise RuntimeError("stopcockd exited; see %s" % d.logpath)
        if metric(d.http, "stopcock_lines_total", source) >= want:
            return time.time() - t0
        time.sleep(0.02)
    raise RuntimeError("stopcockd did not read %d lines in %ds"
                       % (want, TIMEOUT))


def daemon_conf(d, extra):
    return (base_conf + "\n[daemon]\nhttp = 127.0.0.1:%d\nstate = %s\n"
            "tick = 1s\ncheckpoint_every = 5s\n%s" % (d.http, d.state, extra))


out = {}

# --- TCP -------------------------------------------------------------------
lines = sum(1 for _ in open(RECORDS, "rb"))
d = Daemon("bench-tcp", tcp=True, udp=False, unix=False, http=True,
           conf="", start=False, args=())
d.write_conf(daemon_conf(d, "tcp = 127.0.0.1:%d\n" % d.tcp))
d.start()
try:
    s = socket.create_connection(("127.0.0.1", d.tcp))
    t0 = time.time()
    with open(RECORDS, "rb") as f:
        s.sendfile(f)
    s.shutdown(socket.SHUT_WR)
    secs = wait_lines(d, "tcp", lines, t0)
    applied = metric(d.http, "stopcock_records_total", "tcp")
    s.close()
finally:
    d.stop()
out["tcp"] = {"lines": lines, "records_applied": applied,
              "seconds": round(secs, 3),
              "records_per_second": round(lines / secs)}

# --- TCP, signed batches ---------------------------------------------------
KEY = b"bench-producer-key-0000000000001"
signed_path = os.path.join(os.environ["STOPCOCK_TEST_OUT"], "signed.bin")
os.makedirs(os.path.dirname(signed_path), exist_ok=True)
ts = int(time.time())
nbatch = 0


def put_batch(out_f, body):
    global nbatch
    b = b"".join(body)
    mid = b"bench-%d" % nbatch
    mac = hmac.new(KEY, mid + b".%d." % ts + b, hashlib.sha256).digest()
    out_f.write(b"batch bench %s %d %d v1,%s\n" % (
        mid, ts, len(b), base64.b64encode(mac)) + b)
    nbatch += 1


with open(RECORDS, "rb") as in_f, open(signed_path, "wb") as out_f:
    body, n = [], 0
    for rec in in_f:
        if n + len(rec) > 60000:
            put_batch(out_f, body)
            body, n = [], 0
        body.append(rec)
        n += len(rec)
    if body:
        put_batch(out_f, body)
d = Daemon("bench-tcp-signed", tcp=True, udp=False, unix=False, http=True,
           conf="", start=False, args=())
d.write_conf(daemon_conf(d, "tcp = 127.0.0.1:%d\ntcp_signed = yes\n"
                         "\n[producer bench]\nsecret = whsec_%s\n"
                         % (d.tcp, base64.b64encode(KEY).decode())))
d.start()
try:
    s = socket.create_connection(("127.0.0.1", d.tcp))
    t0 = time.time()
    with open(signed_path, "rb") as f:
        s.sendfile(f)
    s.shutdown(socket.SHUT_WR)
    secs = wait_lines(d, "tcp", lines, t0)
    applied = metric(d.http, "stopcock_records_total", "tcp")
    s.close()
finally:
    d.stop()
    os.unlink(signed_path)
out["tcp_signed"] = {"records": lines, "batches": nbatch,
                     "records_applied": applied, "seconds": round(secs, 3),
                     "records_per_second": round(lines / secs),
                     "vs_tcp": round(lines / secs /
                                     out["tcp"]["records_per_second"], 3)}

# --- Redis -----------------------------------------------------------------
def redis_leg(r, name, keys):
    """Preload the entries behind a new group, start a daemon on them
    ([redis] keys added), and time it until every line is read."""
    d = Daemon(name, redis=r, tcp=False, udp=False, unix=False,
               http=True, conf="", start=False, args=())
    d.write_conf(daemon_conf(d, "\n[redis]\naddress = 127.0.0.1:%d\n"
                             "stream = %s\ngroup = %s\nconsumer = %s\n"
                             "dead_letter = %s\nblock = 200ms\n%s"
                             % (r.port, d.stream, d.group, d.consumer,
                                d.dead, keys)))
    # preload behind a consumer group created at the start of the stream,
    # so the daemon finds the whole backlog waiting
    r.cmd("XGROUP", "CREATE", d.stream, d.group, "0", "MKSTREAM")
    # The reference: redis-server accepting exactly these entries, XADD of
    # each pipelined on one connection by this client, the commands
    # encoded before the clock starts; that preload is the stream the
    # daemon then reads.
    bufs = []
    for i in range(0, len(entries), 500):
        chunk = entries[i:i + 500]
        bufs.append((len(chunk), b"".join(
            b"*5\r\n$4\r\nXADD\r\n$%d\r\n%s\r\n$1\r\n*\r\n"
            b"$7\r\nrecords\r\n$%d\r\n%s\r\n"
            % (len(d.stream), d.stream.encode(), len(e), e)
            for e in chunk)))
    conn = _Resp(r.port, timeout=60)
    t0 = time.time()
    for n, buf in bufs:
        conn.sock.sendall(buf)
        for _ in range(n):
            conn.reply()
    xadd_secs = time.time() - t0
    conn.close()
    t0 = time.time()
    d.start()
    try:
        secs = wait_lines(d, "redis", len(head), t0)
        applied = metric(d.http, "stopcock_records_total", "redis")
    finally:
        d.stop()
        d.close()
    r.cmd("DEL", d.stream)
    return {"records": len(head), "records_per_entry": BATCH,
            "entries": len(entries), "records_applied": applied,
            "seconds": round(secs, 3),
            "records_per_second": round(len(head) / secs),
            "xadd_seconds": round(xadd_secs, 3),
            "xadd_records_per_second": round(len(head) / xadd_secs),
            "ratio": round(xadd_secs / secs, 3)}


with open(RECORDS, "rb") as f:
    head = [next(f).rstrip(b"\n") for _ in range(REDIS_RECORDS)]
entries = [b"\n".join(head[i:i + BATCH]) for i in range(0, len(head), BATCH)]
with Redis("bench") as r:
    # for reference only: redis-benchmark's rate (several clients,
    # pipelined, one of our entries repeated)
    n_bench = 50000
    p = subprocess.run(["redis-benchmark", "-h", "127.0.0.1", "-p",
                        str(r.port), "-n", str(n_bench), "-c", "8", "-P",
                        "16", "--csv", "XADD", "bench:xadd", "*", "records",
                        entries[1].decode()], capture_output=True,
                       timeout=TIMEOUT)
    rows = list(csv.reader(io.StringIO(p.stdout.decode())))
    xadd_rps = float(rows[-1][1])
    r.cmd("DEL", "bench:xadd")

    out["redis"] = dict(redis_leg(r, "bench-redis", ""),
                        redis_benchmark_entries_per_second=xadd_rps,
                        redis_benchmark_records_per_second=round(xadd_rps *
                                                                 BATCH))
    # The same backlog read by a daemon with [redis] ha = yes: every read
    # is a script that checks the lease token, the checkpoint goes to Redis.
    out["redis_ha"] = redis_leg(r, "bench-redis-ha",
                                "ha = yes\nlease_ttl = 10s\n")
    out["redis_ha"]["vs_redis"] = round(
        out["redis_ha"]["records_per_second"] /
        out["redis"]["records_per_second"], 3)
print(json.dumps(out))
