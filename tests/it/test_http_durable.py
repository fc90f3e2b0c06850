"""test_http_durable: an operator action is answered only once it is on
disk (issue 12, item 5), against a real stopcockd killed with SIGKILL
right after each 200 answer and started again on the same state
directory. Checkpoints are every 120 s here, so only the action's own
write can have kept it.

Invented scenario: a garden-centre shop plans a seed-packet test over
HTTP, an alert on its germination guardrail is acknowledged, and a later
ramp step is planned; each survives a crash 0 ms after its answer.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _lib  # noqa: E402
from _httplib import TOKEN, Daemon, Tap  # noqa: E402

GUARDRAILS = """
[guardrail germination]
metric = days_to_sprout
test = mean
harm = increase
"""


class SlowCheckpoints(Daemon):
    """The HTTP helper's daemon with checkpoints two minutes apart."""

    def __init__(self, name):
        _lib.Daemon.__init__(self, name, guardrails=GUARDRAILS, extra="",
                             udp=False, unix=False, http=True,
                             daemon_keys={"http_token": TOKEN,
                                          "checkpoint_every": "120s"})


def experiment(d, exp):
    status, j = d.get_json("/api/experiments/%s" % exp)
    return j if status == 200 else None


def crash_and_restart(d):
    d.kill9()
    d.start()


def main():
    t = Tap()
    with SlowCheckpoints("http-durable") as d:
        status, _, j = d.post("/api/experiments/seeds/plan",
                              {"weights": [{"variant": "control",
                                            "weight": 50},
                                           {"variant": "peat_free",
                                            "weight": 50}]})
        t.ok(status == 200 and (j or {}).get("durable") is True,
             "plan over HTTP: 200, durable", (status, j))
        crash_and_restart(d)
        t.ok(experiment(d, "seeds") is not None,
             "the plan survives a SIGKILL right after its answer")

        lines = []
        for i in range(300):
            lines.append("observe seeds control days_to_sprout %.1f" %
                         (10 + (i % 5)))
            lines.append("observe seeds peat_free days_to_sprout %.1f" %
                         (14 + (i % 5)))
        d.send(lines)
        x = experiment(d, "seeds") or {}
        t.ok(any(a.get("guardrail") == "germination" for a in
                 x.get("alerts", [])), "slower sprouting raised an alert",
             x.get("alerts"))
        status, _, j = d.post("/api/experiments/seeds/ack",
                              {"guardrail": "germination",
                               "variant": "peat_free"})
        t.ok(status == 200, "ack: 200", (status, j))
        crash_and_restart(d)
        x = experiment(d, "seeds") or {}
        t.ok(any(a.get("guardrail") == "germination" and
                 a.get("state") == "acked" for a in x.get("alerts", [])),
             "the acknowledgement survives a SIGKILL right after its "
             "answer", x.get("alerts"))

        status, _, j = d.post("/api/experiments/seeds/plan",
                              {"weights": [{"variant": "control",
                                            "weight": 20},
                                           {"variant": "peat_free",
                                            "weight": 80}]})
        t.ok(status == 200, "a ramp step over HTTP: 200", (status, j))
        crash_and_restart(d)
        x = experiment(d, "seeds") or {}
        weights = {a.get("variant"): a.get("weight")
                   for a in x.get("arms", [])}
        t.eq(weights, {"control": 20, "peat_free": 80},
             "the ramp step survives a SIGKILL right after its answer")
        t.ok(d.stop() == 0, "clean stop")
    t.done()


if __name__ == "__main__":
    main()
