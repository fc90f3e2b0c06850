"""test_daemon_retire: retiring an experiment frees its slot (issue 13,
item 4), against a real stopcockd over TCP and HTTP.

Invented scenario: a seed catalogue runs two tests under max_experiments =
2, so a third ("wrapping") is refused with cap_experiments. The operator
retires "sleeves" (POST /api/experiments/sleeves/retire with the token):
its final state lands in the state directory as a JSON archive holding
the exposures it was sent, the experiment is gone from the API, and the
third experiment is now tracked. With [defaults] retire_idle = 2s a
second daemon retires an experiment nobody writes to, and keeps one that
still gets records (stamped long ago: the idle clock is the daemon's,
not the records').
"""
import glob
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _httplib import Daemon, Tap  # noqa: E402
from _lib import STOPCOCK  # noqa: E402

# The first lines land in [defaults] (the helper puts them right after it).
GUARDRAILS = """max_experiments = 2

[guardrail render_mean]
metric = render_ms
test = mean
harm = increase
margin = 3%
"""


def ids(d):
    status, j = d.get_json("/api/experiments")
    return sorted(e["id"] for e in (j or {}).get("experiments", []))


def main():
    t = Tap()
    with Daemon("retire", guardrails=GUARDRAILS) as d:
        lines = ["plan sleeves control=50 kraft=50",
                 "plan labels control=50 foil=50",
                 "plan wrapping control=50 tissue=50"]
        lines += ["expose sleeves %s" % ("control" if i % 3 else "kraft")
                  for i in range(30)]
        d.send(lines)
        t.eq(ids(d), ["labels", "sleeves"],
             "max_experiments = 2: the third plan is refused")

        status, _, j = d.post("/api/experiments/sleeves/retire", token=None)
        t.ok(status == 401, "retire without the token: 401", status)
        status, _, j = d.post("/api/experiments/nosuch/retire")
        t.ok(status == 404, "retire of an unknown experiment: 404", status)

        status, _, j = d.post("/api/experiments/sleeves/retire")
        t.ok(status == 200 and j and j.get("ok"), "retire: 200", (status, j))
        path = (j or {}).get("archive") or ""
        t.ok(os.path.dirname(path) == d.state and os.path.isfile(path),
             "the archive is a file in the state directory", path)
        try:
            arc = json.load(open(path))
        except (OSError, ValueError):
            arc = {}
        arms = {a["variant"]: a["exposures"] for a in
                arc.get("state", {}).get("arms", [])}
        t.eq((arc.get("format"), arc.get("experiment"), arms),
             ("stopcock-archive", "sleeves", {"control": 20, "kraft": 10}),
             "the archive holds the experiment's final state (20 and 10 "
             "exposures, as sent)")
        status, _ = d.get_json("/api/experiments/sleeves")
        t.ok(status == 404, "the retired experiment is gone from the API",
             status)

        d.send(["plan wrapping control=50 tissue=50",
                "expose sleeves control"])
        t.eq(ids(d), ["labels", "wrapping"],
             "its slot is free: the third experiment is tracked now")
        t.ok("retire: archived experiment=sleeves" in d.log_text() and
             "experiment retired experiment=sleeves" in d.log_text(),
             "the log says it was archived and retired")

        # the CLI verb, with the token and address from the daemon's file
        env = {k: v for k, v in os.environ.items()
               if k not in ("STOPCOCK_TOKEN", "STOPCOCK_URL")}
        p = subprocess.run([STOPCOCK, "retire", "labels"], env=env,
                           capture_output=True, text=True, timeout=30)
        t.ok(p.returncode == 64 and "no token" in p.stderr,
             "stopcock retire without a token: exit 64, says why",
             (p.returncode, p.stderr))
        p = subprocess.run([STOPCOCK, "retire", "-c", d.conf_path,
                            "labels"], env=env, capture_output=True,
                           text=True, timeout=30)
        t.ok(p.returncode == 0 and p.stdout.startswith(
             "labels retired; archive " + d.state + "/archive-labels-"),
             "stopcock retire -c CONF EXP: retired, names the archive",
             (p.returncode, p.stdout, p.stderr))
        t.eq(ids(d), ["wrapping"], "and the daemon no longer has it")
        p = subprocess.run([STOPCOCK, "retire", "-c", d.conf_path,
                            "labels"], env=env, capture_output=True,
                           text=True, timeout=30)
        t.ok(p.returncode == 66 and "HTTP 404" in p.stderr,
             "retiring it again: exit 66, HTTP 404", (p.returncode,
                                                      p.stderr))
        t.ok(d.stop() == 0, "clean stop")

    with Daemon("retire-idle", guardrails="retire_idle = 2s\n" +
                GUARDRAILS.split("\n", 1)[1]) as d:
        d.send(["plan quiet control=50 v=50", "plan busy control=50 v=50",
                "expose quiet control"])
        end = time.time() + 15
        while time.time() < end and "quiet" in ids(d):
            # busy keeps getting records, stamped in 2001
            d.send(["@1000000000 expose busy control"])
            time.sleep(0.3)
        t.eq(ids(d), ["busy"], "retire_idle: the quiet experiment is "
             "retired, the one still written to is kept")
        arcs = glob.glob(os.path.join(d.state, "archive-quiet-*.json"))
        t.ok(len(arcs) == 1 and json.load(open(arcs[0])).get("reason") ==
             "idle", "its archive is in the state directory, reason idle",
             arcs)
        t.ok("reason=idle" in d.log_text(), "the log says why")
        t.ok(d.stop() == 0, "clean stop")
    t.done()


if __name__ == "__main__":
    main()
