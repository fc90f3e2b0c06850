"""/metrics parsed by a real Prometheus parser (Debian's
python3-prometheus-client, prometheus_client.parser), from a real
stopcockd fed over TCP. Checks the content type, that each family is
declared once, the daemon's own families, the per experiment / guardrail
/ arm gauges with their labels, and that label values survive the round
trip for names made of every character a name may hold (the protocol
allows [A-Za-z0-9._:-] only; the escaping of \\ " and newline is there for
any value, and the parser checks the whole output's syntax)."""
import os
import re
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _httplib import Daemon, Tap, feed, harm_for  # noqa

from prometheus_client.parser import text_string_to_metric_families

# Valid names that look like trouble for a careless exporter: label-ish
# punctuation, leading digits and dots, the longest allowed name.
EXP = "9:exp.v2-rc_1::x"
GUARD = "render.p50:ms-3_a"
LONG = "L" * 63 + ":"

GUARDRAILS = """
[guardrail %s]
metric = render_ms
test = mean
harm = increase
margin = 3%%

[guardrail api_errors]
metric = server_errors
test = proportion
harm = increase
margin = 0
""" % GUARD


def main():
    t = Tap()
    d = Daemon("metrics", guardrails=GUARDRAILS)
    try:
        feed(d, LONG, chunks=1, per=200, seed=3, skew=1.0)
        feed(d, EXP, treatment="b.2:x-y")
        got = d.wait_for(lambda l: harm_for(l, EXP, GUARD))
        t.ok(got is not None, "the harmful arm is found before scraping")
        d.get("/nowhere")   # one 404 for the response counters
        status, h, data = d.get("/metrics")
        text = data.decode("utf-8")
        with open(os.path.join(os.environ.get("STOPCOCK_TEST_OUT", "."),
                               "metrics.txt"), "w") as f:
            f.write(text)
        t.ok(status == 200, "GET /metrics -> 200")
        t.ok(h.get("content-type", "").startswith("text/plain")
             and "version=0.0.4" in h.get("content-type", ""),
             "content type names exposition format 0.0.4", h)
        t.ok(text.endswith("\n"), "output ends with a newline")

        types = re.findall(r"^# TYPE (\S+) ", text, re.M)
        dups = sorted({n for n in types if types.count(n) > 1})
        t.ok(not dups, "every family has one TYPE line", dups)
        helps = re.findall(r"^# HELP (\S+) ", text, re.M)
        t.ok(sorted(helps) == sorted(types), "every family has HELP once",
             set(helps) ^ set(types))

        try:
            fams = {f.name: f for f in text_string_to_metric_families(text)}
            parsed = True
        except Exception as e:  # the parser raises ValueError and others
            fams, parsed = {}, False
            t.ok(False, "prometheus_client parses /metrics", repr(e))
        if parsed:
            t.ok(True, "prometheus_client parses /metrics")

        # prometheus_client strips _total from counter family names.
        for name in ("stopcock_build_info", "stopcock_uptime_seconds",
                     "stopcock_checkpoint_age_seconds",
                     "stopcock_checkpoints", "stopcock_http_responses",
                     "stopcock_engine_experiments", "stopcock_records",
                     "stopcock_rejected", "stopcock_test_log_e",
                     "stopcock_test_p_value", "stopcock_test_estimate",
                     "stopcock_test_lower", "stopcock_test_upper",
                     "stopcock_test_verdict", "stopcock_srm_log_e",
                     "stopcock_srm_p_value", "stopcock_srm_verdict",
                     "stopcock_arm_exposures"):
            t.ok(name in fams, "family %s present" % name,
                 sorted(fams)[:60])

        def samples(fam):
            return fams[fam].samples if fam in fams else []

        ver = [s for s in samples("stopcock_test_verdict")
               if s.labels.get("experiment") == EXP
               and s.labels.get("guardrail") == GUARD]
        t.ok(len(ver) == 1 and ver[0].labels.get("variant") == "b.2:x-y"
             and ver[0].value == 1.0,
             "verdict gauge = 1 (harm) for the harmful arm, labels intact",
             [(s.labels, s.value) for s in samples("stopcock_test_verdict")])
        t.ok(all(s.value in (0.0, 1.0, 2.0)
                 for s in samples("stopcock_test_verdict")),
             "verdict gauges take 0, 1 or 2 only")
        t.ok(all(set(s.labels) == {"experiment", "guardrail", "variant"}
                 for f in ("stopcock_test_log_e", "stopcock_test_p_value",
                           "stopcock_test_estimate", "stopcock_test_lower",
                           "stopcock_test_upper")
                 for s in samples(f)),
             "test gauges carry experiment, guardrail and variant labels")
        lo = [s.value for s in samples("stopcock_test_lower")
              if s.labels.get("experiment") == EXP
              and s.labels.get("guardrail") == GUARD]
        est = [s.value for s in samples("stopcock_test_estimate")
               if s.labels.get("experiment") == EXP
               and s.labels.get("guardrail") == GUARD]
        t.ok(len(lo) == 1 and len(est) == 1 and lo[0] > 0 and est[0] > lo[0],
             "lower bound above zero, estimate above it (harm)", (lo, est))
        p = [s.value for s in samples("stopcock_test_p_value")]
        t.ok(p and all(0 <= v <= 1 for v in p), "p-values in [0, 1]", p)
        exps = {s.labels.get("experiment")
                for s in samples("stopcock_arm_exposures")}
        t.ok(EXP in exps and LONG in exps,
             "arm exposures labelled with both experiment names", exps)
        ex = {s.labels["variant"]: s.value
              for s in samples("stopcock_arm_exposures")
              if s.labels.get("experiment") == EXP}
        t.ok(ex.get("control") == 1600 and ex.get("b.2:x-y") == 1600,
             "exposure gauges count what was sent", ex)
        code404 = [s.value for s in samples("stopcock_http_responses")
                   if s.labels.get("code") == "404"
                   and s.name.endswith("_total")]
        t.ok(code404 and code404[0] >= 1, "the 404 was counted", code404)
        bi = samples("stopcock_build_info")
        t.ok(bi and bi[0].value == 1 and bi[0].labels.get("version"),
             "build info carries a version label", bi)
    finally:
        d.stop()
    t.done()


if __name__ == "__main__":
    main()
