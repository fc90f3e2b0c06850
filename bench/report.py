"""Assemble `make bench` figures (bench/run.sh) into one JSON document on
stdout and a readable table on stderr, each figure beside its target from
issue 7 and, when bench/results.prev.json exists, beside the last run.

    report.py TMPDIR RECORDS GEN_S WC_LINES WC_S MAWK_S REPLAY_S TOTAL_S
"""
import json
import os
import platform
import re
import subprocess
import sys
import time

tmp = sys.argv[1]
records = int(sys.argv[2])
gen_s, wc_lines, wc_s, mawk_s, replay_s, total_s = (
    float(sys.argv[3]), int(sys.argv[4]), float(sys.argv[5]),
    float(sys.argv[6]), float(sys.argv[7]), float(sys.argv[8]))


def load(name):
    with open(os.path.join(tmp, name)) as f:
        return json.load(f)


def cpu_model():
    try:
        with open("/proc/cpuinfo") as f:
            m = re.search(r"^model name\s*:\s*(.*)$", f.read(), re.M)
            return m.group(1) if m else platform.processor()
    except OSError:
        return platform.processor()


def commit():
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"],
                              capture_output=True, timeout=10
                              ).stdout.decode().strip()
    except OSError:
        return None


with open(os.path.join(tmp, "replay.err")) as f:
    replay_err = f.read()
m = re.search(r"(\d+) records applied, (\d+) rejected", replay_err)
replay_applied = int(m.group(1)) if m else None
ingest = load("ingest.json")
kafka = load("kafka.json")
mem = load("mem.json")
aa = load("sim_aa.json")
harm = load("sim_harm.json")

replay_rps = records / replay_s
mawk_rps = records / mawk_s
wc_rps = wc_lines / wc_s
res = {
    "machine": {"cpus": os.cpu_count(), "cpu": cpu_model(),
                "kernel": platform.release(),
                "date": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "commit": commit()},
    "generate": {"records": records, "seconds": gen_s,
                 "records_per_second": round(records / gen_s)},
    "replay": {"records": records, "applied": replay_applied,
               "seconds": replay_s, "records_per_second": round(replay_rps),
               "record_time_rate": 50000, "target": 15e6,
               "met": replay_rps >= 15e6},
    "wc": {"lines": wc_lines, "seconds": wc_s,
           "lines_per_second": round(wc_rps)},
    "mawk": {"seconds": mawk_s, "records_per_second": round(mawk_rps)},
    "ratios": {"replay_vs_mawk": round(replay_rps / mawk_rps, 4),
               "replay_vs_mawk_target": 4.0,
               "replay_vs_wc": round(replay_rps / wc_rps, 4),
               "replay_vs_wc_target": 0.2},
    "tcp": dict(ingest["tcp"], target=5e6,
                met=ingest["tcp"]["records_per_second"] >= 5e6),
    "tcp_signed": ingest.get("tcp_signed"),
    "redis": dict(ingest["redis"], target_ratio=1.0,
                  met=ingest["redis"]["ratio"] >= 1.0),
    "redis_ha": ingest.get("redis_ha"),
    "kafka": kafka,
    "memory": dict(mem, target_bytes_per_series=8192,
                   met=mem["rss_bytes_per_series"] <= 8192),
    "tick": {"experiments": mem["experiments"], "tests": mem["tests"],
             "all_dirty_ms": mem["tick_all_dirty_ms"],
             "idle_ms": mem["tick_idle_ms"],
             "forced_ms": mem["tick_forced_ms"],
             "tick_budget": mem.get("tick_budget"), "target_ms": 50,
             "met": mem["tick_all_dirty_ms"] < 50},
    "simulate": {"aa": {"runs": aa["runs"],
                        "records_per_run": aa["records_per_run"],
                        "tests": [], "srm": None, "family": aa["family"]},
                 "harm": {"runs": harm["runs"],
                          "records_per_run": harm["records_per_run"],
                          "tests": []}},
    "total_seconds": total_s,
}
for t in aa["tests"]:
    fa = t["false_alarm"]
    res["simulate"]["aa"]["tests"].append(
        {"guardrail": t["guardrail"], "test": t["test"], "rate": fa["rate"],
         "se": fa["se"], "level": fa["level"], "bound": fa["bound"],
         "met": fa["ok"]})
fa = aa["srm"]["false_alarm"]
res["simulate"]["aa"]["srm"] = {"rate": fa["rate"], "se": fa["se"],
                                "level": fa["level"], "bound": fa["bound"],
                                "met": fa["ok"]}
for t in harm["tests"]:
    e = {"guardrail": t["guardrail"], "test": t["test"],
         "effect": t["effect"]}
    if "detection" in t:
        d = t["detection"]
        e.update(probability=d["probability"],
                 median_records=d["median_records"],
                 p90_records=d["p90_records"],
                 fixed_horizon_records=t["fixed_horizon"]["records"])
    else:
        e.update(false_alarm=t["false_alarm"]["rate"],
                 met=t["false_alarm"]["ok"])
    res["simulate"]["harm"]["tests"].append(e)
print(json.dumps(res, indent=2))

prev = None
if os.path.exists("bench/results.prev.json"):
    try:
        with open("bench/results.prev.json") as f:
            prev = json.load(f)
    except (OSError, ValueError):
        prev = None


def was(path):
    if prev is None:
        return ""
    v = prev
    for k in path:
        if not isinstance(v, dict) or k not in v:
            return ""
        v = v[k]
    return "  (last run %s)" % (("%.4g" % v) if isinstance(v, (int, float))
                                else v)


def line(text, met=None, path=None):
    mark = "" if met is None else ("  [target met]" if met else
                                   "  [TARGET MISSED]")
    sys.stderr.write(text + mark + (was(path) if path else "") + "\n")


r = res
line("\nstopcock bench on %s (%d CPUs), commit %s" %
     (r["machine"]["cpu"], r["machine"]["cpus"], r["machine"]["commit"]))
line("generate   %d records in %.2f s: %.0f records/s" %
     (records, gen_s, records / gen_s))
line("replay     %.0f records/s (%.2f s, every guardrail kind; target "
     ">= 15e6)" % (replay_rps, replay_s), r["replay"]["met"],
     ("replay", "records_per_second"))
line("wc -l      %.0f lines/s (%.3f s); replay / wc = %.4f (target >= 0.2)"
     % (wc_rps, wc_s, r["ratios"]["replay_vs_wc"]),
     r["ratios"]["replay_vs_wc"] >= 0.2, ("ratios", "replay_vs_wc"))
line("mawk tally %.0f records/s (%.2f s); replay / mawk = %.4f (target "
     ">= 4)" % (mawk_rps, mawk_s, r["ratios"]["replay_vs_mawk"]),
     r["ratios"]["replay_vs_mawk"] >= 4, ("ratios", "replay_vs_mawk"))
t = r["tcp"]
line("TCP ingest %d records/s (%d records, %.2f s; target >= 5e6)" %
     (t["records_per_second"], t["lines"], t["seconds"]), t["met"],
     ("tcp", "records_per_second"))
t = r["tcp_signed"]
if t:
    line("TCP signed %d records/s (%d records in %d signed batches, %.2f s; "
         "%.3f of plain TCP)" % (t["records_per_second"], t["records"],
                                t["batches"], t["seconds"], t["vs_tcp"]))
t = r["redis"]
line("Redis      %d records/s (%d records in %d entries, %.2f s); "
     "XADD of the same entries, same client %d records/s (%.2f s); ratio "
     "%.3f (target >= 1); redis-benchmark XADD %d records/s (reference)"
     % (t["records_per_second"], t["records"], t["entries"], t["seconds"],
        t["xadd_records_per_second"], t["xadd_seconds"], t["ratio"],
        t["redis_benchmark_records_per_second"]),
     t["met"], ("redis", "ratio"))
if "redis_ha" in r:
    t = r["redis_ha"]
    line("Redis ha   %d records/s (%d records, %.2f s): %.3f of the plain "
         "Redis rate (reads fenced by the lease, checkpoint in Redis)" %
         (t["records_per_second"], t["records"], t["seconds"],
          t["vs_redis"]), None, ("redis_ha", "records_per_second"))
t = r["kafka"]
line("Kafka      one daemon %d records/s, three of one group %d records/s "
     "(aggregate; ratio %.3f; %d records in %d messages, %d partitions, "
     "mock cluster, %d CPUs shared; both applied the same records: %s)" %
     (t["one"]["records_per_second"], t["three"]["records_per_second"],
      t["ratio"], t["records"], t["messages"], t["partitions"],
      r["machine"]["cpus"], "yes" if t["same_records"] else "NO"),
     None, ("kafka", "three", "records_per_second"))
if "records_per_cpu_second" in t["one"]:
    line("Kafka cpu  %d records per daemon-CPU-second with one daemon, %d "
         "with three (user + system time of the daemons only)" %
         (t["one"]["records_per_cpu_second"] or 0,
          t["three"]["records_per_cpu_second"] or 0), None,
         ("kafka", "one", "records_per_cpu_second"))
if "stall" in t:
    st = t["stall"]
    line("Kafka loop longest API answer: %.0f ms reading (timer commits), "
         "%.0f ms joining, %.0f ms leaving (median %.1f ms reading)" %
         (st["reading"]["max_ms"], st["join"]["max_ms"],
          st["leave"]["max_ms"], st["reading"]["median_ms"]), None,
         ("kafka", "stall", "reading", "max_ms"))
t = r["memory"]
line("memory     %.0f bytes per series by RSS (%d series, %d -> %d KiB); "
     "engine's own count %.0f bytes (target <= 8192)" %
     (t["rss_bytes_per_series"], t["series"], t["rss_before_kib"],
      t["rss_after_kib"], t["engine_bytes_per_series"]), t["met"],
     ("memory", "rss_bytes_per_series"))
t = r["tick"]
line("tick       %.1f ms over %d experiments (%d tests, all with new data; "
     "tick_budget %s costly looks per tick); a look at every test "
     "(engine_finish) %.1f ms; idle %.2f ms (target < 50 ms)" %
     (t["all_dirty_ms"], t["experiments"], t["tests"], t["tick_budget"],
      t["forced_ms"], t["idle_ms"]), t["met"], ("tick", "all_dirty_ms"))
a = r["simulate"]["aa"]
line("simulate   A/A, %d runs of %d records:" % (a["runs"],
                                                a["records_per_run"]))
for t in a["tests"] + [dict(a["srm"], guardrail="srm", test="srm")]:
    line("             %-12s %-10s false alarms %.4f +- %.4f (bound %.4f)" %
         (t["guardrail"], t["test"], t["rate"], t["se"] or 0, t["bound"]),
         t["met"])
h = r["simulate"]["harm"]
line("simulate   harm in every kind, %d runs of %d records:" %
     (h["runs"], h["records_per_run"]))
for t in h["tests"]:
    if "probability" in t:
        line("             %-12s %-10s detected %.3f, median %s records, "
             "90th pct %s; fixed horizon %s" %
             (t["guardrail"], t["test"], t["probability"],
              t["median_records"], t["p90_records"],
              t["fixed_horizon_records"]))
    else:
        line("             %-12s %-10s effect inside the margin: false "
             "alarms %.4f" % (t["guardrail"], t["test"], t["false_alarm"]),
             t["met"])
line("total      %.0f s" % total_s)
