"""test_cli_actions: every operator action has a CLI verb (issue 13,
point 9 and "CLI verbs for every operator action"), against a real
stopcockd over TCP and HTTP: stopcock plan, ack, epoch, reset, close
(retire has its own test). The token and address come from the daemon's
configuration file (-c), and the plan's JSON body uses the record
protocol's own names ("weights": [{"variant", "weight"}]).

Invented scenario: a bakery's loyalty app tries a new checkout ("oven")
against the old one; its render time is clearly worse, so the render
guardrail raises harm, which the operator acknowledges; then the team
ramps to 40/60 and finally resets the experiment.
"""
import os
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _httplib import Daemon, Tap  # noqa: E402
from _lib import STOPCOCK  # noqa: E402

GUARDRAILS = """
[guardrail render_mean]
metric = render_ms
test = mean
harm = increase
"""


def cli(d, *args):
    env = {k: v for k, v in os.environ.items()
           if k not in ("STOPCOCK_TOKEN", "STOPCOCK_URL")}
    return subprocess.run([STOPCOCK] + list(args[:1]) + ["-c", d.conf_path]
                          + list(args[1:]), env=env, capture_output=True,
                          text=True, timeout=30)


def experiment(d, exp):
    status, j = d.get_json("/api/experiments/%s" % exp)
    return j if status == 200 else None


def main():
    t = Tap()
    with Daemon("cli-actions", guardrails=GUARDRAILS) as d:
        p = cli(d, "plan", "loyalty", "control=50", "oven=50")
        x = experiment(d, "loyalty")
        t.ok(p.returncode == 0 and "loyalty planned" in p.stdout and
             x is not None, "stopcock plan EXP ARM=W ARM=W: planned",
             (p.returncode, p.stdout, p.stderr))
        p = cli(d, "plan", "loyalty", "control=50")
        t.ok(p.returncode == 64, "a plan needs two arms: usage, exit 64",
             (p.returncode, p.stderr))

        lines = []
        for i in range(400):
            lines.append("observe loyalty control render_ms %.1f" %
                         (100 + (i % 7)))
            lines.append("observe loyalty oven render_ms %.1f" %
                         (160 + (i % 7)))
        d.send(lines)
        x = experiment(d, "loyalty") or {}
        alerts = [a for a in x.get("alerts", [])
                  if a.get("guardrail") == "render_mean"]
        t.ok(alerts, "the slower checkout raised a harm alert", x.get(
             "alerts"))

        p = cli(d, "ack", "loyalty", "render_mean", "oven")
        x = experiment(d, "loyalty") or {}
        t.ok(p.returncode == 0 and "acknowledged" in p.stdout and any(
             a.get("state") == "acked" for a in x.get("alerts", [])),
             "stopcock ack EXP GUARDRAIL VARIANT: the alert is acked",
             (p.returncode, p.stdout, p.stderr, x.get("alerts")))
        p = cli(d, "ack", "loyalty", "no_such", "oven")
        t.ok(p.returncode != 0 and "HTTP 400" in p.stderr,
             "ack of an alert that does not exist: refused, says HTTP 400",
             (p.returncode, p.stderr))
        p = cli(d, "ack", "loyalty", "render_mean")
        t.ok(p.returncode == 64, "ack without a variant: usage, exit 64",
             p.returncode)

        p = cli(d, "close", "loyalty", "render_mean", "oven")
        x = experiment(d, "loyalty") or {}
        t.ok(p.returncode == 0 and "closed" in p.stdout and not any(
             a.get("guardrail") == "render_mean" and a.get("state") in
             ("raised", "acked") for a in x.get("alerts", [])),
             "stopcock close EXP GUARDRAIL VARIANT: the alert is resolved",
             (p.returncode, p.stdout, p.stderr, x.get("alerts")))

        p = cli(d, "close", "loyalty", "render_mean", "oven")
        t.ok(p.returncode != 0 and "no open alert" in p.stderr,
             "closing it again: refused, says there is no open alert",
             (p.returncode, p.stderr))

        before = (experiment(d, "loyalty") or {}).get("epoch")
        p = cli(d, "epoch", "loyalty")
        after = (experiment(d, "loyalty") or {}).get("epoch")
        t.ok(p.returncode == 0 and before is not None and after ==
             before + 1, "stopcock epoch EXP: the next epoch",
             (p.returncode, before, after, p.stderr))

        p = cli(d, "plan", "loyalty", "control=40", "oven=60")
        x = experiment(d, "loyalty") or {}
        weights = {a.get("variant"): a.get("weight")
                   for a in x.get("arms", [])}
        t.ok(p.returncode == 0 and weights == {"control": 40, "oven": 60},
             "stopcock plan with new weights: the ramp step is in force",
             (p.returncode, weights, p.stderr))

        p = cli(d, "reset", "loyalty")
        t.ok(p.returncode == 0 and "reset" in p.stdout,
             "stopcock reset EXP: 200", (p.returncode, p.stdout, p.stderr))
        p = cli(d, "reset", "nosuch")
        t.ok(p.returncode == 66 and "HTTP 404" in p.stderr,
             "an unknown experiment: exit 66, HTTP 404",
             (p.returncode, p.stderr))
        t.ok(d.stop() == 0, "clean stop")
    t.done()


if __name__ == "__main__":
    main()
