"""Helpers for the HTTP, metrics and page integration tests, on top of
_lib.py: a stopcockd (started and awaited by _lib.Daemon, readiness via
sd_notify) with its HTTP server and a bearer token, HTTP requests with the
standard library (http.client, so status codes and headers are seen as
sent), and a live record feed over TCP. Not a test itself (leading "_").

The scenario is invented: a meal-kit shop tests a new checkout ("one_page")
whose pages render about 10% slower than the control's; the margin is 3%.
"""
import http.client
import json
import os
import random
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _lib  # noqa: E402
from _lib import BUILD, OUT, Tap  # noqa: E402,F401

TOKEN = "it-token-0123456789abcdef"


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


class Daemon(_lib.Daemon):
    """_lib's stopcockd with TCP in, HTTP on, and (unless token=None) an
    http_token for the actions."""

    def __init__(self, name, token=TOKEN, guardrails=GUARDRAILS, extra=""):
        keys = {"http_token": token} if token else {}
        super().__init__(name, guardrails=guardrails, extra=extra,
                         udp=False, unix=False, http=True, daemon_keys=keys)

    def stop(self, timeout=20):
        code = super().stop(timeout)
        self.close()
        return code

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
        self.send_tcp(lines)

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
