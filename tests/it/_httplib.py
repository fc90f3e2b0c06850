"""Helpers for the HTTP, metrics and page integration tests: start a real
stopcockd on private loopback ports with a configuration of our own, feed
it records over its TCP listener, and talk HTTP to it with the standard
library (http.client, so status codes and headers are seen as sent).
Not a test itself (leading "_").

The scenario is invented: a meal-kit shop tests a new checkout ("one_page")
whose pages render about 10% slower than the control's; the margin is 3%.
"""
import http.client
import json
import os
import random
import socket
import subprocess
import sys
import tempfile
import time

BUILD = os.environ.get("STOPCOCK_BUILD", "build")
OUT = os.environ.get("STOPCOCK_TEST_OUT", os.path.join(BUILD, "test-output"))
TOKEN = "it-token-0123456789abcdef"


class Tap:
    """Minimal TAP printer; exit status 1 when any check failed."""

    def __init__(self):
        self.n = 0
        self.failed = 0

    def ok(self, cond, name, detail=None):
        self.n += 1
        if cond:
            print("ok %d %s" % (self.n, name))
        else:
            self.failed += 1
            print("not ok %d %s" % (self.n, name))
            if detail is not None:
                for line in str(detail).splitlines()[:20]:
                    print("# " + line)
        sys.stdout.flush()
        return cond

    def done(self):
        print("1..%d" % self.n)
        sys.exit(1 if self.failed else 0)


def free_port():
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


GUARDRAILS = """
[guardrail render_mean]
metric = render_ms
test = mean
harm = increase
margin = 3%

[guardrail api_errors]
metric = server_errors
test = proportion
harm = increase
margin = 0
"""


class Daemon:
    """A stopcockd with its own state directory, TCP and HTTP ports."""

    def __init__(self, name, token=TOKEN, guardrails=GUARDRAILS, extra=""):
        self.dir = tempfile.mkdtemp(prefix="stopcock-%s-" % name)
        self.tcp = free_port()
        self.http = free_port()
        self.name = name
        conf = os.path.join(self.dir, "stopcock.conf")
        with open(conf, "w") as f:
            f.write("[defaults]\nalpha = 0.05\nsrm_alpha = 0.001\n"
                    "plan_units = 2000\n")
            f.write(guardrails)
            f.write("\n[daemon]\ntcp = 127.0.0.1:%d\nhttp = 127.0.0.1:%d\n"
                    "state = %s\ntick = 200ms\n"
                    % (self.tcp, self.http, self.dir))
            if token:
                f.write("http_token = %s\n" % token)
            f.write(extra)
        self.log = open(os.path.join(OUT, "%s-stopcockd.log" % name), "w")
        self.proc = subprocess.Popen(
            [os.path.join(BUILD, "stopcockd"), "-f", "-c", conf],
            stdout=self.log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
        deadline = time.time() + 15
        while time.time() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("stopcockd exited with %d; see %s"
                                   % (self.proc.returncode, self.log.name))
            try:
                status, _, _ = self.get("/api/health")
                if status == 200:
                    return
            except OSError:
                pass
            time.sleep(0.1)
        self.stop()
        raise RuntimeError("stopcockd did not answer on HTTP in time")

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.log.close()

    def request(self, method, path, body=None, headers=None):
        c = http.client.HTTPConnection("127.0.0.1", self.http, timeout=10)
        try:
            c.request(method, path, body=body, headers=headers or {})
            r = c.getresponse()
            data = r.read()
            return r.status, {k.lower(): v for k, v in r.getheaders()}, data
        finally:
            c.close()

    def get(self, path):
        return self.request("GET", path)

    def get_json(self, path):
        status, headers, data = self.get(path)
        return status, json.loads(data.decode()) if data else None

    def post(self, path, obj=None, token=TOKEN, ctype="application/json",
             raw=None):
        headers = {}
        if token is not None:
            headers["Authorization"] = "Bearer " + token
        if ctype is not None:
            headers["Content-Type"] = ctype
        body = raw if raw is not None else (
            json.dumps(obj).encode() if obj is not None else b"")
        status, h, data = self.request("POST", path, body, headers)
        try:
            j = json.loads(data.decode())
        except ValueError:
            j = None
        return status, h, j

    def send(self, lines):
        with socket.create_connection(("127.0.0.1", self.tcp), timeout=10) as s:
            s.sendall(("\n".join(lines) + "\n").encode())

    def wait_for(self, pred, timeout=20):
        """Poll /api/experiments until pred(list) is true."""
        deadline = time.time() + timeout
        last = None
        while time.time() < deadline:
            status, last = self.get_json("/api/experiments")
            if status == 200 and pred(last):
                return last
            time.sleep(0.2)
        return None


def feed(d, exp, chunks=8, per=400, seed=7, treatment="one_page",
         skew=1.10, drop=0.0):
    """Stream an experiment live: chunks of `per` units stamped with the
    current time, a little more than a tick apart, so the daemon takes a
    chart point per chunk. drop is the share of the treatment's units
    lost before they reach us (a sample ratio mismatch)."""
    rnd = random.Random(seed)
    d.send(["plan %s control=50 %s=50" % (exp, treatment)])
    for c in range(chunks):
        lines = []
        for i in range(per):
            arm = "control" if i % 2 == 0 else treatment
            if arm == treatment and rnd.random() < drop:
                continue
            mu = 300.0 * (skew if arm == treatment else 1.0)
            lines.append("expose %s %s" % (exp, arm))
            lines.append("observe %s %s render_ms %.2f"
                         % (exp, arm, rnd.gauss(mu, 30.0)))
            lines.append("count %s %s server_errors %d 1"
                         % (exp, arm, 1 if rnd.random() < 0.02 else 0))
        d.send(lines)
        time.sleep(0.3)


def harm_for(lst, exp, guardrail="render_mean"):
    for x in lst.get("experiments", []):
        if x.get("id") == exp:
            for g in x.get("guardrails", []):
                if g.get("name") == guardrail and g.get("verdict") == "harm":
                    return True
    return False
