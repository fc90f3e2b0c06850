"""The daemon's JSON API, charts and page against a real stopcockd fed
over TCP: response shapes (as pinned in include/stopcock/engine.h), the
bearer token on actions (refused without it, 403 when none is
configured), the actions themselves, errors as JSON with the right status,
and the chart SVGs parsing as XML (Python's xml.etree, independent of the
unit test's checker)."""
import json
import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _httplib import BUILD, TOKEN, Daemon, Tap, feed, harm_for  # noqa

EXP = "checkout_redesign"
SVG = "{http://www.w3.org/2000/svg}"


def is_num_or_null(x):
    return x is None or isinstance(x, (int, float))


def check_shapes(t, d):
    status, j = d.get_json("/api/health")
    t.ok(status == 200 and j.get("status") == "ok", "health answers ok", j)
    t.ok(isinstance(j.get("uptime_seconds"), (int, float))
         and j["uptime_seconds"] >= 0, "health has uptime", j)
    t.ok("checkpoint_age_seconds" in j and is_num_or_null(
        j["checkpoint_age_seconds"]), "health has checkpoint age", j)
    t.ok("redis" in j, "health has a redis entry", j)

    feed(d, EXP)
    lst = d.wait_for(lambda l: harm_for(l, EXP))
    t.ok(lst is not None, "harm on render_mean shows in /api/experiments")
    if lst is None:
        return False
    x = [e for e in lst["experiments"] if e["id"] == EXP][0]
    t.ok(isinstance(x["epoch"], int) and x["epoch"] == 1, "list: epoch", x)
    arms = {a["variant"]: a for a in x["arms"]}
    t.ok(set(arms) == {"control", "one_page"}
         and all(isinstance(a["exposures"], int) and a["exposures"] > 0
                 and isinstance(a["weight"], (int, float))
                 for a in arms.values()), "list: arms with exposures", x)
    t.ok(all(g["verdict"] in ("harm", "safe", "undecided")
             and "name" in g and "variant" in g for g in x["guardrails"]),
         "list: guardrails with one-word verdicts", x["guardrails"])
    t.ok(isinstance(x["srm"], dict) and x["srm"]["verdict"] in
         ("harm", "undecided") and is_num_or_null(x["srm"]["p"]),
         "list: srm verdict and p", x.get("srm"))

    status, x = d.get_json("/api/experiments/" + EXP)
    t.ok(status == 200, "detail: 200")
    for key in ("control", "alpha", "srm_alpha", "family", "epochs", "srm",
                "tests", "alerts"):
        t.ok(key in x, "detail: has %s" % key)
    tests = x.get("tests", [])
    harm = [e for e in tests if e.get("guardrail") == "render_mean"
            and e.get("verdict") == "harm"]
    t.ok(len(harm) == 1, "detail: render_mean x one_page is harmful",
         [(e.get("guardrail"), e.get("verdict")) for e in tests])
    if harm:
        h = harm[0]
        t.ok(all(is_num_or_null(h.get(k)) for k in (
            "estimate", "lower", "upper", "rel_estimate", "rel_lower",
            "rel_upper", "p", "alpha", "margin")),
            "detail: estimate, bounds, relative, p, alpha", h)
        hist = h.get("history", [])
        t.ok(len(hist) >= 2 and all(len(r) == 5 for r in hist),
             "detail: history rows [t, estimate, lower, upper, p]", hist[:3])
        t.ok(h["lower"] > h["margin"], "detail: harm means the lower bound "
             "is past the margin", (h["lower"], h["margin"]))
    t.ok(isinstance(x["srm"].get("history"), list),
         "detail: srm history", x.get("srm"))
    status, al = d.get_json("/api/alerts")
    t.ok(status == 200 and isinstance(al.get("alerts"), list),
         "alerts: {\"alerts\": [...]}", al)
    check_status_cli(t, d)
    return True


def check_status_cli(t, d):
    """`stopcock status` over the same API (not a TTY: no colour)."""
    cli = os.path.join(BUILD, "stopcock")
    url = "http://127.0.0.1:%d" % d.http

    def run(*args):
        r = subprocess.run([cli, "status", "--url", url] + list(args),
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           stdin=subprocess.DEVNULL, timeout=30)
        return r.returncode, r.stdout.decode(), r.stderr.decode()

    rc, out, err = run()
    t.ok(rc == 0 and EXP in out and re.search(
        r"^\s+harm\s+render_mean / one_page", out, re.M) and
        "\033[" not in out, "status lists the harmful guardrail in words",
        out + err)
    rc, out, err = run(EXP)
    t.ok(rc == 0 and re.search(r"^harm\s+render_mean / one_page\s+\+", out,
                               re.M), "status EXP shows the harmful test "
         "with its effect", out + err)
    rc, out, err = run("--json", EXP)
    try:
        ok = json.loads(out)["id"] == EXP
    except (ValueError, KeyError):
        ok = False
    t.ok(rc == 0 and ok, "status --json passes the API's JSON", out[:300])
    rc, out, err = run("no_such_exp")
    t.ok(rc == 66 and "no experiment" in err, "status of an unknown "
         "experiment fails with EX_NOINPUT and the API's message", (rc, err))
    r = subprocess.run([cli, "status", "--url", "http://127.0.0.1:1"],
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                       timeout=30)
    t.ok(r.returncode == 74 and r.stderr, "status against no daemon fails "
         "with EX_IOERR and a reason", r.stderr)


def check_errors(t, d):
    for path, code in (("/api/experiments/no_such_exp", 404),
                       ("/api/experiments/bad%22name", 404),
                       ("/nowhere", 404), ("/api/nowhere", 404),
                       ("/api/experiments/a/b/c/d", 404),
                       ("/chart/no_such_exp/0.svg", 404),
                       ("/chart/%s/99.svg" % EXP, 404),
                       ("/chart/%s/x.png" % EXP, 404)):
        status, h, data = d.get(path)
        try:
            msg = json.loads(data.decode()).get("error")
        except ValueError:
            msg = None
        t.ok(status == code and h.get("content-type", "").startswith(
            "application/json") and isinstance(msg, str) and msg,
            "GET %s -> %d with a JSON error" % (path, code), (status, data))
    status, h, _ = d.request("DELETE", "/api/experiments")
    t.ok(status == 405 and "GET" in h.get("allow", ""),
         "DELETE on a read-only resource -> 405 with Allow", (status, h))
    status, h, _ = d.get("/api/experiments/%s/epoch" % EXP)
    t.ok(status == 405 and h.get("allow") == "POST",
         "GET on an action -> 405 Allow: POST", (status, h))


def check_actions(t, d):
    path = "/api/experiments/%s/epoch" % EXP
    status, h, j = d.post(path, token=None)
    t.ok(status == 401 and "bearer" in h.get("www-authenticate", "").lower()
         and j and j.get("error"), "POST without a token -> 401", (status, j))
    status, h, j = d.post(path, token="it-token-0123456789abcdeX")
    t.ok(status == 401, "POST with a wrong token -> 401", (status, j))
    status, h, j = d.post(path, token=TOKEN[:-1])
    t.ok(status == 401, "POST with a token prefix -> 401", (status, j))
    status, _, j = d.post("/api/experiments/no_such_exp/epoch")
    t.ok(status == 404, "POST epoch on an unknown experiment -> 404",
         (status, j))
    status, _, j = d.post("/api/experiments/%s/launch" % EXP)
    t.ok(status == 404, "POST an unknown action -> 404", (status, j))

    status, al = d.get_json("/api/alerts")
    raised = [a for a in al.get("alerts", []) if a.get("experiment") == EXP
              and a.get("guardrail") == "render_mean"
              and a.get("state") == "raised"]
    t.ok(len(raised) == 1, "the harm raised one alert", al)
    status, _, j = d.post("/api/experiments/%s/ack" % EXP,
                          {"guardrail": "render_mean",
                           "variant": "one_page"})
    t.ok(status == 200 and j.get("ok") is True, "POST ack -> 200",
         (status, j))
    status, x = d.get_json("/api/experiments/" + EXP)
    t.ok(any(a.get("guardrail") == "render_mean" and
             a.get("state") == "acked" for a in x.get("alerts", [])),
         "the experiment's alert shows as acknowledged", x.get("alerts"))

    plan = "/api/experiments/%s/plan" % EXP
    good = {"arms": [{"variant": "control", "weight": 50},
                     {"variant": "one_page", "weight": 50}]}
    status, _, j = d.post(plan, good, ctype="text/plain")
    t.ok(status == 415, "plan as text/plain -> 415", (status, j))
    status, _, j = d.post(plan, raw=b"{\"arms\": [", ctype="application/json")
    t.ok(status == 400 and "JSON" in j.get("error", ""),
         "plan with broken JSON -> 400", (status, j))
    status, _, j = d.post(plan, raw=b"x" * (64 * 1024 + 1))
    t.ok(status == 413 and j and j.get("error"),
         "a body over 64 KiB -> 413 with a JSON error", (status, j))
    for bad, why in (({"arms": []}, "no arms"),
                     ({"arms": [{"variant": "a b", "weight": 1}]}, "bad name"),
                     ({"arms": [{"variant": "a", "weight": -1}]}, "negative"),
                     ({"arms": [{"variant": "a", "weight": 1},
                                {"variant": "a", "weight": 1}]}, "twice"),
                     ({"arms": [{"variant": "v%d" % i, "weight": 1}
                                for i in range(17)]}, "17 arms"),
                     ([1, 2], "not an object")):
        status, _, j = d.post(plan, bad)
        t.ok(status == 400 and j and j.get("error"),
             "plan refused (%s) -> 400" % why, (status, j))

    status, _, j = d.post(path)
    t.ok(status == 200 and j.get("ok") is True, "POST epoch -> 200", j)
    status, x = d.get_json("/api/experiments/" + EXP)
    t.ok(x.get("epoch") == 2 and len(x.get("epochs", [])) == 2,
         "a new epoch started", (x.get("epoch"), x.get("epochs")))

    status, _, j = d.post("/api/experiments/api_planned/plan",
                          {"arms": [{"variant": "control", "weight": 2},
                                    {"variant": "fast", "weight": 1}]})
    t.ok(status == 200, "POST plan of a new experiment -> 200", j)
    status, x = d.get_json("/api/experiments/api_planned")
    t.ok(status == 200 and [a["variant"] for a in x.get("arms", [])] ==
         ["control", "fast"], "the planned experiment is listed", x)

    status, _, j = d.post("/api/experiments/%s/ack" % EXP, {"variant": "x"})
    t.ok(status == 400, "ack without a guardrail -> 400", (status, j))
    status, _, j = d.post("/api/experiments/%s/ack" % EXP,
                          {"guardrail": "no_such", "variant": "one_page"})
    t.ok(status == 400 and j.get("error"), "ack of no alert -> 400",
         (status, j))

    status, _, j = d.post("/api/experiments/%s/reset" % EXP)
    t.ok(status == 200, "POST reset -> 200", (status, j))
    status, x = d.get_json("/api/experiments/" + EXP)
    t.ok(status == 200 and not any(e.get("verdict") == "harm"
                                   for e in x.get("tests", [])),
         "after a reset no verdict of harm remains",
         [(e.get("guardrail"), e.get("verdict")) for e in x.get("tests", [])])


def check_charts_and_page(t, d, exp):
    status, x = d.get_json("/api/experiments/" + exp)
    tests = x.get("tests", [])
    for i in range(len(tests)):
        status, h, data = d.get("/chart/%s/%d.svg" % (exp, i))
        ok = status == 200 and h.get("content-type", "").startswith(
            "image/svg+xml")
        try:
            root = ET.fromstring(data)
            lines = [e for e in root.iter(SVG + "line")
                     if e.get("class") in ("margin", "zero")]
            ok = ok and root.tag == SVG + "svg" and len(lines) >= 1
        except ET.ParseError as e:
            ok = False
            data = str(e)
        t.ok(ok, "chart %d of %s is SVG with reference lines" % (i, exp),
             data[:300])
    status, h, data = d.get("/chart/%s/srm.svg" % exp)
    try:
        root = ET.fromstring(data)
        thr = [e for e in root.iter(SVG + "line")
               if e.get("class") == "threshold"]
    except ET.ParseError:
        thr = []
    t.ok(status == 200 and len(thr) == 1, "SRM chart parses, has its "
         "threshold line", data[:300])

    status, h, data = d.get("/")
    page = data.decode("utf-8", "replace")
    t.ok(status == 200 and h.get("content-type", "").startswith("text/html"),
         "GET / serves the page")
    t.ok("default-src 'none'" in h.get("content-security-policy", ""),
         "the page's CSP allows nothing from elsewhere", h)
    external = re.findall(r'(?:src|href)\s*=\s*["\']?(?:https?:)?//', page)
    t.ok(not external and "<script src" not in page and "@import" not in
         page and "url(" not in page, "the page loads nothing external",
         external)
    status, h, data = d.request("HEAD", "/")
    t.ok(status == 200 and data == b"", "HEAD / -> 200 without a body",
         (status, len(data)))


def main():
    t = Tap()
    d = Daemon("http-api")
    try:
        if check_shapes(t, d):
            check_charts_and_page(t, d, EXP)
        check_errors(t, d)
        check_actions(t, d)
    finally:
        d.stop()
    # Without a token configured the actions are off: 403, not 401.
    d = Daemon("http-notoken", token=None)
    try:
        status, _, j = d.post("/api/experiments/x/epoch")
        t.ok(status == 403 and "token" in (j or {}).get("error", ""),
             "no http_token configured: POST -> 403", (status, j))
        status, _, j = d.post("/api/experiments/x/plan", token=None,
                              obj={"arms": [{"variant": "a", "weight": 1}]})
        t.ok(status == 403, "no http_token configured: even without "
             "a header -> 403", (status, j))
    finally:
        d.stop()
    t.done()


if __name__ == "__main__":
    main()
