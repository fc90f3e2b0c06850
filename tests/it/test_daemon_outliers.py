"""A few huge values do not wreck the quantile tests of the real daemon
(issue 12, item 3), with action = pause and a real pause receiver.

Invented scenario: a tram operator's journey planner tests a new route
search against the old one; the guardrails are the p50 and p90 of the
search latency (ms), margin 5%, action = pause. Latencies are lognormal
(4.6, 0.5): median exp(4.6) = 99.5 ms.

  big7, big9, big300  1% of the treatment's values are 1e7, 1e9 or 1e300
                      ms (a broken timer), the body the same as the
                      control's. The treatment's true p90 is the body's
                      0.9/0.99 quantile, exp(0.5 (z(0.90909) - z(0.9))) =
                      1.027 times the control's and its p50 1.006 times
                      (z from scipy.stats.norm.ppf: 1.33518, 1.28155), both
                      inside the 5% margin: no harm, no pause.
                      Before the sketch kept its edges exact, 1% at 1e7
                      folded the arm's body into one bucket (p90 361.5 for
                      108.1) and harm was declared at p = 2.7e-132.
  slower              both arms with 1% at 1e300, the treatment's body 1.3
                      times slower: harm on both guardrails and a pause
                      (the outliers do not hide real harm).

Nothing here is read back from the daemon to make the expectation: the
margins and true ratios above are computed from the distribution.
"""
import json
import math
import os
import random
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, wait_for  # noqa: E402
from _alertlib import PAUSE_SECRET, SECRET, Receiver  # noqa: E402

GUARDRAILS = """
[guardrail search_p50]
metric = search_ms
test = quantile
quantile = 0.5
margin = 5%
action = pause

[guardrail search_p90]
metric = search_ms
test = quantile
quantile = 0.9
margin = 5%
action = pause
"""
N = 20000	# values per arm
EXPS = {"big7": 1e7, "big9": 1e9, "big300": 1e300, "slower": 1e300}


def records(exp, outlier, seed):
    rng = random.Random(seed)
    out = ["plan %s control=50 treatment=50" % exp]
    for i in range(N):
        for arm in ("control", "treatment"):
            x = math.exp(4.6 + 0.5 * rng.gauss(0, 1))
            if exp == "slower" and arm == "treatment":
                x *= 1.3
            if i % 100 == 37 and (arm == "treatment" or exp == "slower"):
                x = outlier
            out.append("observe %s %s search_ms %.17g" % (exp, arm, x))
    return out


def main():
    tap = Tap()
    ops = Receiver()
    prcv = Receiver(secret=PAUSE_SECRET)
    extra = """
[webhook ops]
url = %s
secret = %s

[pause]
url = %s
secret = %s
max_per_hour = 100
""" % (ops.url, SECRET, prcv.url, PAUSE_SECRET)
    with Daemon("outliers", guardrails=GUARDRAILS, extra=extra, udp=False,
                unix=False, http=True,
                # unsigned TCP, trusted here so auto-pause acts on it
                daemon_keys={"checkpoint_every": "5s",
                             "tcp_trusted": "yes"}) as d:
        for k, (exp, big) in enumerate(EXPS.items()):
            d.send_tcp(records(exp, big, 70 + k))
        # The harm on "slower" shows the tests have looked; then give
        # the others the same time to (wrongly) raise anything.
        pause = prcv.wait(lambda r: [x for x in r if x["json"] and
                                     x["json"].get("experiment") ==
                                     "slower"], 60)
        tap.ok(pause, "slower: the real harm pauses despite 1% at 1e300 "
               "in both arms")
        harms = ops.wait(lambda r: {(x["json"]["experiment"],
                                     x["json"].get("guardrail"))
                                    for x in r if x["json"] and
                                    x["json"].get("alert") == "harm"}
                         >= {("slower", "search_p50"),
                             ("slower", "search_p90")}, 30)
        tap.ok(harms, "slower: harm raised on p50 and p90")
        wait_for(lambda: False, 3)
        reqs = ops.snapshot()
        for exp, big in EXPS.items():
            if exp == "slower":
                continue
            bad = [(x["json"]["alert"], x["json"].get("guardrail"))
                   for x in reqs if x["json"] and
                   x["json"].get("experiment") == exp and
                   x["json"].get("alert") in ("harm", "pause")]
            tap.eq(bad, [], "%s: 1%% of the treatment at %g raises no "
                   "harm and no pause" % (exp, big))
        paused = sorted({x["json"].get("experiment")
                         for x in prcv.snapshot() if x["json"]})
        tap.eq(paused, ["slower"], "only the truly slower experiment is "
               "paused")
        audit = os.path.join(d.state, "pause-audit.log")
        with open(audit) as f:
            lines = [json.loads(s) for s in f if s.strip()]
        tap.ok(all(a["experiment"] == "slower" for a in lines) and lines,
               "the pause audit names only slower",
               [a["experiment"] for a in lines])
        tap.ok(d.stop() == 0, "clean exit")
    ops.close()
    prcv.close()
    return tap.done()


if __name__ == "__main__":
    sys.exit(main())
