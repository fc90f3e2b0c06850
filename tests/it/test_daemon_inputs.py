"""stopcockd's four inputs against the offline engine.

One record stream (invented: a bicycle-share app tries a quicker unlock
flow, "quick", whose unlock errors and unlock times are worse than the
control's) is split over TCP, UDP datagrams, the Unix socket (partly as
JSON lines) and a Redis stream, with a few bad lines on each. The daemon's
tallies must equal `stopcock replay` over the same records (records
applied, rejections by reason, experiments, final verdicts) and the
exposures counted straight from the text in Python.
"""
import http.client
import json
import random
import time

from prometheus_client.parser import text_string_to_metric_families

from _lib import Tap, Redis, Daemon, replay, final_verdicts, exposures, \
    summary_exposures, summary_verdicts

GUARDRAILS = """
[guardrail unlock_errors]
metric = unlock_errors
test = proportion
harm = increase
margin = 0

[guardrail unlock_time]
metric = unlock_ms
test = mean
harm = increase
margin = 3%
"""

EXP = "unlock_flow"


def records(rng, n_units, t0):
    """Plain lines with explicit times: one unit exposes, counts and
    observes. quick: 7% errors vs 2%, unlock 15% slower."""
    out = []
    t = t0
    for i in range(n_units):
        arm = "control" if i % 2 == 0 else "quick"
        p = 0.02 if arm == "control" else 0.07
        mu = 800.0 if arm == "control" else 920.0
        k = sum(1 for _ in range(10) if rng.random() < p)
        t += 0.01
        out.append("@%.2f expose %s %s" % (t, EXP, arm))
        out.append("@%.2f count %s %s unlock_errors %d 10" % (t, EXP, arm, k))
        out.append("@%.2f observe %s %s unlock_ms %.1f"
                   % (t, EXP, arm, rng.gauss(mu, 120.0)))
    return out


def as_json(line):
    """The JSON-lines form of a plain record (for the Unix socket)."""
    f = line.split()
    o = {"ts": float(f[0][1:]), "kind": f[1], "experiment": f[2],
         "variant": f[3]}
    if f[1] == "count":
        o.update(metric=f[4], k=float(f[5]), n=float(f[6]))
    elif f[1] == "observe":
        o.update(metric=f[4], value=float(f[5]))
    return json.dumps(o)


def check_metrics(tap, d, want_applied, want):
    """The ingest, listener and Redis counters on /metrics, parsed by the
    Prometheus project's own Python parser."""
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    c.request("GET", "/metrics")
    text = c.getresponse().read().decode()
    c.close()
    samples = {}
    try:
        for fam in text_string_to_metric_families(text):
            for s in fam.samples:
                samples[(s.name, tuple(sorted(s.labels.items())))] = s.value
    except Exception as e:	# the parser's own errors
        tap.ok(False, "prometheus_client parses /metrics", repr(e))
        return
    tap.ok(True, "prometheus_client parses /metrics")
    for src, n in want_applied.items():
        tap.eq(samples.get(("stopcock_records_total",
                            (("source", src),))), n,
               "stopcock_records_total{source=%s}" % src)
    tap.eq(samples.get(("stopcock_rejected_total", (("reason", "bad_name"),
                                                     ("source", "tcp")))), 1,
           "stopcock_rejected_total{source=tcp,reason=bad_name}")
    tap.eq(samples.get(("stopcock_redis_up", ())), 1, "stopcock_redis_up")
    tap.eq(samples.get(("stopcock_redis_entries_total", ())),
           want["redis_entries"], "stopcock_redis_entries_total")
    tap.eq(samples.get(("stopcock_udp_datagrams_total", ())),
           want["udp_datagrams"], "stopcock_udp_datagrams_total")


def main():
    tap = Tap()
    rng = random.Random(20240611)
    t0 = time.time() - 3600
    plan = "@%.2f plan %s control=50 quick=50" % (t0, EXP)
    recs = records(rng, 1200, t0)
    parts = {"tcp": [], "udp": [], "unix": [], "redis": []}
    names = list(parts)
    # Whole pairs of units (one per arm) per source, so that every source
    # alone is balanced and no SRM appears from the order of arrival.
    for i, line in enumerate(recs):
        parts[names[(i // 6) % 4]].append(line)
    bad = {
        "tcp": ["expose %s bad/name" % EXP, "frobnicate x y"],
        "udp": ["observe %s quick unlock_ms NaN" % EXP],
        "unix": ['{"kind": "expose", "experiment": 3}',
                 "expose %s quick 0" % EXP],
        "redis": ["count %s quick unlock_errors 1" % EXP],
    }
    unplanned = "expose no_such_plan control"
    sent = {k: parts[k] + bad[k] for k in parts}
    sent["tcp"] = [plan, unplanned] + sent["tcp"]

    with Redis("inputs") as redis, \
            Daemon("inputs", redis=redis, guardrails=GUARDRAILS,
                   http=True) as d:
        tap.ok(d.wait_notice("READY=1", 0) is not None,
               "READY=1 reached the notify socket")
        d.send_tcp(sent["tcp"])
        d.send_udp(sent["udp"][:len(sent["udp"]) // 2], per_datagram=40)
        # The rest as one big datagram (well under 64 KiB).
        big = sent["udp"][len(sent["udp"]) // 2:]
        d.send_udp(big, per_datagram=len(big))
        unix = [as_json(l) if i % 2 else l
                for i, l in enumerate(parts["unix"])] + bad["unix"]
        d.send_unix(unix)
        for i in range(0, len(sent["redis"]), 25):
            redis.xadd(d.stream, {"records":
                                  "\n".join(sent["redis"][i:i + 25])})
        want_applied = {k: len(parts[k]) for k in parts}
        want_applied["tcp"] += 1	# the plan
        ck = d.wait_checkpoint(
            lambda c: all(Daemon.records(c, s) == n
                          for s, n in want_applied.items()), timeout=30)
        if not tap.ok(ck is not None, "every source's records applied"):
            ck = d.checkpoint()
            tap.diag(json.dumps(ck["counters"]["ingest"]))
        n_udp = (len(sent["udp"]) // 2 + 39) // 40 + 1
        check_metrics(tap, d, want_applied, {
            "redis_entries": (len(sent["redis"]) + 24) // 25,
            "udp_datagrams": n_udp})
        tap.ok(d.stop() == 0, "SIGTERM: clean exit")
        tap.ok("STOPPING=1" in d.notices, "STOPPING=1 sent on shutdown",
               d.notices)
        final = d.read_checkpoint()

        for s in names:
            tap.eq(Daemon.records(final, s), want_applied[s],
                   "%s: records applied" % s)
        rej = final["counters"]["ingest"]["rejected"]
        tap.eq(rej["tcp"], {"bad_name": 1, "bad_kind": 1, "unplanned": 1},
               "tcp: rejections by reason")
        tap.eq(rej["udp"], {"bad_number": 1}, "udp: rejections by reason")
        tap.eq(sum(rej["unix"].values()), 2, "unix: two lines rejected")
        tap.eq(rej["redis"], {"bad_fields": 1}, "redis: rejections by reason")

        # The offline engine over the same records, in time order.
        all_lines = [plan, unplanned] + recs + sum(bad.values(), [])
        findings, summary = replay(d.conf_path, all_lines)
        tap.eq(Daemon.records(final), summary["records"],
               "records applied equal replay's")
        tap.eq(sum(sum(v.values()) for v in rej.values()),
               summary["rejected"], "rejections equal replay's")
        merged = {}
        for v in rej.values():
            for reason, n in v.items():
                merged[reason] = merged.get(reason, 0) + n
        tap.eq(merged, summary["reasons"], "rejection reasons equal replay's")
        tap.eq(len(final["summary"]["experiments"]), summary["experiments"],
               "experiments equal replay's")
        tap.eq(summary_exposures(final), exposures(recs),
               "exposures per arm equal the count from the text")
        got = summary_verdicts(final)
        want = final_verdicts(findings)
        for key in [(EXP, "unlock_errors", "quick"),
                    (EXP, "unlock_time", "quick")]:
            tap.eq(got.get(key), "harm", "daemon: %s/%s harm" % key[1:])
            tap.eq(want.get(key), "harm", "replay: %s/%s harm" % key[1:])
        tap.eq({k: v for k, v in got.items() if v != "undecided"},
               want, "final verdicts equal replay's")
        srm = final["summary"]["experiments"][0]["srm"]["verdict"]
        srm_replay = "harm" if any(f["kind"] == "srm" and
                                   f["verdict"] == "harm"
                                   for f in findings) else "undecided"
        tap.eq(srm, srm_replay, "SRM verdict equals replay's")
        lines = final["counters"]["ingest"]["lines"]
        tap.eq(lines["redis"], len(sent["redis"]),
               "redis: every line of every entry read")
        tap.eq(final["counters"]["listen"]["udp_datagrams"], n_udp,
               "udp: datagrams")
    tap.done()


if __name__ == "__main__":
    main()
