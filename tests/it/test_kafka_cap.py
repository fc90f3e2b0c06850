"""test_kafka_cap: a daemon's Kafka partitions hold its experiments once,
and under one bound, against librdkafka's mock cluster and the real
stopcockd.

Each owned partition has its own engine. Two things went wrong with that
on c10648d, both shown here:

 1. An experiment planned in the configuration ([experiment] plan) was
    planned in every partition's engine and in the main one: with 8
    partitions the API listed it 9 times, 8 of them empty. Now a
    partition plans it when its first record arrives, so it lives once,
    in the partition its key reaches, with the whole tally, also after
    a kill -9 and a restart.
 2. max_experiments held per engine, so a producer sending new keys
    spread over many partitions could make a daemon hold partitions x
    max_experiments experiments. Now the partitions' engines share one
    bound: with max_experiments = 12 and 8 partitions, 60 hostile keys
    leave at most 12 experiments, the rest refused and counted as
    cap_experiments, and the experiments kept before the flood keep
    their records.

Invented scenario: a seaside ferry operator tests a new boarding-pass
page ("ferry_boarding_pass", planned in the configuration) while a
misbehaving load generator invents experiment names.
"""
import json
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Tap, wait_for  # noqa: E402
from test_kafka import Mock, kafka_daemon, get, partitions, messages, \
    uncommitted, metrics, GUARDRAILS  # noqa: E402

NPART = 8
CAP = 12
PLANNED = "ferry_boarding_pass"
EXTRA = "\n[experiment %s]\nplan = control=50 treatment=50\n" % PLANNED


def listed(d):
    st, body = get(d, "/api/experiments")
    return [e for e in json.loads(body)["experiments"]] if st == 200 else []


def exposures(d, exp):
    return sorted(sum(a["exposures"] for a in e["arms"])
                  for e in listed(d) if e["id"] == exp)


def refused(d, reason):
    return sum(v for n, l, v in metrics(d) if n == "stopcock_rejected_total"
               and l.get("reason") == reason)


def main():
    tap = Tap()
    mock = Mock(NPART, "kafka-mock-cap")
    d = None
    try:
        d = kafka_daemon("kafka-cap", mock, "ferry", "it-cap",
                         guardrails="max_experiments = %d\n" % CAP +
                         GUARDRAILS, extra=EXTRA)
        tap.ok(wait_for(lambda: partitions(d) == set(range(NPART)), 30),
               "one daemon owns all %d partitions" % NPART)
        tap.eq(len(listed(d)), 0, "before any record no engine holds a "
               "copy of the configured experiment")

        # 1. records for the configured experiment, no plan line: they
        # land in one partition, which plans it from the configuration
        sent = 0
        for i in range(40):
            arm = "control" if i % 2 else "treatment"
            mock.send(PLANNED, ["expose %s %s" % (PLANNED, arm),
                                "count %s %s failed_checkout 0 1" %
                                (PLANNED, arm)])
            sent += 1
        tap.eq(mock.flush(), (40, 0), "40 messages produced")
        tap.ok(wait_for(lambda: exposures(d, PLANNED) == [sent], 20),
               "the configured experiment is listed once, with all %d "
               "exposures" % sent, exposures(d, PLANNED))

        # 2. a flood of invented experiment names over every partition
        for i in range(60):
            name = "ferry_noise_%02d" % i
            mock.send(name, ["plan %s a=50 b=50" % name,
                             "expose %s a" % name])
        tap.eq(mock.flush(), (100, 0), "60 more messages, with new keys, produced")
        tap.ok(wait_for(lambda: messages(d) >= 100, 20),
               "the daemon read them all")
        n = len(listed(d))
        tap.ok(n <= CAP, "at most max_experiments = %d experiments across "
               "the %d partitions (%d)" % (CAP, NPART, n))
        tap.ok(n == CAP, "the bound is filled, not undercut (%d)" % n)
        tap.ok(refused(d, "cap_experiments") >= 60 - (CAP - 1),
               "the refused plans and records are counted as "
               "cap_experiments (%d)" % refused(d, "cap_experiments"))
        tap.eq(exposures(d, PLANNED), [sent], "the experiment kept before "
               "the flood keeps its records")

        # 3. kill -9 after the states are committed, restart: the same
        tap.ok(wait_for(lambda: uncommitted(d) == 0, 20),
               "every partition's state committed")
        d.kill9()
        d.start()
        tap.ok(wait_for(lambda: partitions(d) == set(range(NPART)), 30),
               "restarted, it owns the %d partitions again" % NPART)
        tap.ok(wait_for(lambda: len(listed(d)) == n, 20),
               "the restored partitions hold the same %d experiments" % n,
               len(listed(d)))
        tap.eq(exposures(d, PLANNED), [sent], "the configured experiment "
               "once, with its tally, after the restart")
        for i in range(5):
            name = "ferry_late_%d" % i
            mock.send(name, ["plan %s a=50 b=50" % name])
        mock.flush()
        tap.ok(wait_for(lambda: messages(d) >= 105, 20) and
               len(listed(d)) == n, "still no room for new keys after the "
               "restart (%d)" % len(listed(d)))
        tap.ok(d.stop() == 0, "clean stop")
    finally:
        if d is not None:
            d.kill9()
        mock.close()
    tap.done()


if __name__ == "__main__":
    main()
