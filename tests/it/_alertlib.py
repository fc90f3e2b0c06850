"""Helpers for the alert, webhook and pause integration tests.

A real HTTP receiver (http.server from the Python standard library) that
verifies every Standard Webhooks signature itself, with hmac/hashlib/base64
(an implementation independent of the daemon's OpenSSL code), a real unix
datagram socket standing in for /dev/log, and generators of record streams
with a clearly harmful treatment arm. Not a test itself (leading "_").
"""
import base64
import hashlib
import hmac
import json
import os
import random
import socket
import ssl
import subprocess
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

# Invented secrets, base64 of 24 random-looking bytes.
SECRET = "whsec_" + base64.b64encode(b"larder-lane-test-key-001").decode()
PAUSE_SECRET = "whsec_" + base64.b64encode(b"pause-receiver-key-0002").decode()
TOLERANCE = 300  # seconds of clock skew a receiver accepts


def verify(secret, headers, body):
    """Standard Webhooks verification, written from the specification:
    the signed content is id.timestamp.body, the key is the base64 after
    the whsec_ prefix, the header holds space-separated "v1,<base64>"
    entries of which one must match. Returns None when valid, else why."""
    msg_id = headers.get("webhook-id")
    ts = headers.get("webhook-timestamp")
    sigs = headers.get("webhook-signature")
    if not msg_id or not ts or not sigs:
        return "missing webhook headers"
    try:
        t = int(ts)
    except ValueError:
        return "bad timestamp %r" % ts
    if abs(time.time() - t) > TOLERANCE:
        return "timestamp too far from now"
    key = base64.b64decode(secret[len("whsec_"):])
    signed = msg_id.encode() + b"." + ts.encode() + b"." + body
    want = base64.b64encode(hmac.new(key, signed, hashlib.sha256).digest())
    for entry in sigs.split(" "):
        version, _, sig = entry.partition(",")
        if version == "v1" and hmac.compare_digest(sig.encode(), want):
            return None
    return "no signature matches"


class Receiver:
    """An HTTP receiver on a private loopback port. `script` is a list of
    status codes answered in turn; after it runs out, `default`."""

    def __init__(self, secret=SECRET, script=(), default=200, port=0,
                 tls=None):
        self.secret = secret
        self.script = list(script)
        self.default = default
        self.requests = []  # dicts: path, headers, body, json, status, error
        self.lock = threading.Lock()
        self.cond = threading.Condition(self.lock)
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):
                n = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(n)
                headers = {k.lower(): v for k, v in self.headers.items()}
                err = verify(outer.secret, headers, body) \
                    if outer.secret else None
                with outer.cond:
                    status = outer.script.pop(0) if outer.script \
                        else outer.default
                    try:
                        doc = json.loads(body)
                    except ValueError:
                        doc = None
                    outer.requests.append({
                        "path": self.path, "headers": headers, "body": body,
                        "json": doc, "status": status, "error": err,
                        "time": time.time()})
                    outer.cond.notify_all()
                self.send_response(status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", port), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.url = "http://127.0.0.1:%d/hook" % self.port
        if tls is not None:
            # tls = (certfile, keyfile): HTTPS with that certificate.
            ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
            ctx.load_cert_chain(*tls)
            self.server.socket = ctx.wrap_socket(self.server.socket,
                                                 server_side=True)
            self.url = "https://127.0.0.1:%d/hook" % self.port
        self.thread = threading.Thread(target=self.server.serve_forever,
                                       daemon=True)
        self.thread.start()

    def wait(self, pred, timeout):
        """Wait until pred(requests) is true; returns it (or the last)."""
        end = time.time() + timeout
        with self.cond:
            while True:
                r = pred(self.requests)
                if r or time.time() >= end:
                    return r
                self.cond.wait(max(0.05, min(0.5, end - time.time())))

    def snapshot(self):
        with self.lock:
            return list(self.requests)

    def close(self):
        self.server.shutdown()
        self.server.server_close()


def unshare_ok():
    """True when this process may make a private mount namespace."""
    try:
        return subprocess.run(["unshare", "-m", "true"],
                              capture_output=True, timeout=10
                              ).returncode == 0
    except (OSError, subprocess.TimeoutExpired):
        return False


# Run as: sh WRAP DIR SYSLOG_SOCKET CA_BUNDLE cmd... inside unshare -m:
# /dev is replaced by DIR (bind mounts of the usual device nodes plus a
# "log" symlink to the test's socket) and, when given, the system CA
# bundle by the test's. Only the daemon's namespace sees either.
_WRAP = r"""set -e
D=$1; S=$2; CA=$3; shift 3
if [ -n "$S" ]; then
	for n in null zero full random urandom; do
		: > "$D/$n"
		mount --bind "/dev/$n" "$D/$n"
	done
	ln -sf /proc/self/fd "$D/fd"
	ln -sf "$S" "$D/log"
	mount --rbind "$D" /dev
fi
if [ -n "$CA" ]; then
	mount --bind "$CA" /etc/ssl/certs/ca-certificates.crt
fi
exec "$@"
"""
SYSTEM_CA = "/etc/ssl/certs/ca-certificates.crt"	# libcurl's bundle


def namespace_wrap(d, syslog_socket="", ca_bundle=""):
    """Set _lib.Daemon d to run in its own mount namespace (see _WRAP)."""
    devdir = os.path.join(d.dir, "dev")
    os.makedirs(devdir, exist_ok=True)
    wrap = os.path.join(d.dir, "wrap.sh")
    with open(wrap, "w") as f:
        f.write(_WRAP)
    d.wrap = ["unshare", "-m", "--propagation", "private", "sh", wrap,
              devdir, syslog_socket, ca_bundle]


def make_certs(directory):
    """A test CA and a server certificate for 127.0.0.1 signed by it, plus
    a self-signed certificate for 127.0.0.1 that no CA vouches for
    (openssl command line). Returns paths in a dict."""
    p = {k: os.path.join(directory, k) for k in (
        "ca.pem", "ca.key", "srv.pem", "srv.key", "srv.csr", "ext.cnf",
        "self.pem", "self.key")}

    def run(*args):
        subprocess.run(["openssl"] + list(args), check=True,
                       capture_output=True, timeout=60)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
          "-nodes"]
    run("req", "-x509", *ec, "-keyout", p["ca.key"], "-out", p["ca.pem"],
        "-days", "2", "-subj", "/CN=stopcock-it-ca", "-addext",
        "basicConstraints=critical,CA:TRUE", "-addext",
        "keyUsage=critical,keyCertSign,cRLSign")
    run("req", *ec, "-keyout", p["srv.key"], "-out", p["srv.csr"], "-subj",
        "/CN=127.0.0.1")
    with open(p["ext.cnf"], "w") as f:
        f.write("subjectAltName=IP:127.0.0.1\nbasicConstraints=CA:FALSE\n"
                "extendedKeyUsage=serverAuth\n")
    run("x509", "-req", "-in", p["srv.csr"], "-CA", p["ca.pem"], "-CAkey",
        p["ca.key"], "-CAcreateserial", "-out", p["srv.pem"], "-days", "2",
        "-extfile", p["ext.cnf"])
    run("req", "-x509", *ec, "-keyout", p["self.key"], "-out", p["self.pem"],
        "-days", "2", "-subj", "/CN=127.0.0.1", "-addext",
        "subjectAltName=IP:127.0.0.1")
    return p


class SyslogSocket:
    """A unix datagram socket that receives what syslog(3) sends."""

    def __init__(self, path):
        self.path = path
        if os.path.exists(path):
            os.unlink(path)
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(path)
        os.chmod(path, 0o666)
        self.sock.settimeout(0.2)
        self.lines = []

    def read(self, pred, timeout):
        end = time.time() + timeout
        while time.time() < end:
            hit = [l for l in self.lines if pred(l)]
            if hit:
                return hit
            try:
                data = self.sock.recv(65536)
            except socket.timeout:
                continue
            self.lines.append(data.decode("utf-8", "replace"))
        return [l for l in self.lines if pred(l)]

    def close(self):
        self.sock.close()


def unit_records(exp, metric, arms, seed, skew=None):
    """A plan with equal weights for arms [(variant, units, error share)],
    control first; then per unit one expose and one count record (K of 1),
    arms shuffled together. skew={variant: units} first adds exposures
    only, in those numbers, to provoke a sample ratio mismatch."""
    rng = random.Random(seed)
    out = ["plan %s %s" % (exp, " ".join("%s=50" % a[0] for a in arms))]
    if skew:
        pre = [v for v, n in skew.items() for _ in range(n)]
        rng.shuffle(pre)
        out += ["expose %s %s" % (exp, v) for v in pre]
    units = [(v, p) for v, n, p in arms for _ in range(n)]
    rng.shuffle(units)
    for arm, p in units:
        out.append("expose %s %s" % (exp, arm))
        out.append("count %s %s %s %d 1" % (exp, arm, metric,
                                             1 if rng.random() < p else 0))
    return out


def harmful_records(exp, metric, n_per_arm, p_control, p_treatment, seed):
    """Two arms; the treatment's error share is clearly higher."""
    return unit_records(exp, metric, [("control", n_per_arm, p_control),
                                      ("treatment", n_per_arm, p_treatment)],
                        seed)
