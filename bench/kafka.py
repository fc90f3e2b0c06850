"""Kafka ingest of one daemon and of three, for `make bench` (bench/run.sh).

    /usr/bin/python3 bench/kafka.py BUILD CONF [RECORDS]

Generates RECORDS records (`stopcock generate`, 192 experiments, every
guardrail kind of CONF), groups them into messages keyed by their
experiment (at most BATCH lines each, an experiment's lines in order, the
experiments interleaved) and preloads them into a 32-partition topic of
librdkafka's mock cluster (BUILD/tests/kafkamock: three brokers in one
process on loopback). The mock keeps about 5 MB per partition and drops
older messages, so the records are spread thin enough to stay whole.
In the same run, on the same messages, each on a fresh cluster:

  one:   one stopcockd in consumer group "bench-one";
  three: three stopcockd in consumer group "bench-three" (they share the
         32 partitions).

The daemons join and settle first (every partition owned), then the
messages are produced; the figure is the aggregate rate, the records the
daemons applied divided by the time from the first message produced
until /metrics (polled every POLL s) counts every line. Producing is
part of that time (it overlaps the reading; produce_seconds says how
long it took). Prints one JSON object. The daemons, the producer and
the mock cluster share this machine's CPUs: the ratio says what a second
and third daemon add here, not on separate hosts.
"""
import json
import os
import re
import subprocess
import sys
import time
import urllib.request

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BUILD, CONF = sys.argv[1], sys.argv[2]
RECORDS = int(sys.argv[3]) if len(sys.argv) > 3 else 1000000
os.environ["STOPCOCK_BUILD"] = BUILD
os.environ.setdefault("STOPCOCK_TEST_OUT", os.path.join(BUILD, "bench-out"))
sys.path.insert(0, os.path.join(ROOT, "tests", "it"))
from _lib import Daemon  # noqa: E402

NPART = 32
BATCH = 500		# lines per message at most
EXPERIMENTS = 192	# spread so no partition outgrows the mock's 5 MB
POLL = 0.05		# s between /metrics reads
TIMEOUT = int(os.environ.get("BENCH_KAFKA_TIMEOUT", "120"))	# s, one group

with open(CONF) as f:
    base_conf = f.read()


def generate():
    p = subprocess.run([os.path.join(BUILD, "stopcock"), "generate", "-c",
                        CONF, "--experiments", str(EXPERIMENTS), "--records",
                        str(RECORDS), "--rate", "50000", "--seed", "5"],
                       capture_output=True, text=True, check=True)
    by_exp, order = {}, []
    for line in p.stdout.splitlines():
        f = line.split()
        if f and f[0].startswith("@"):	# the record's time
            f = f[1:]
        if len(f) < 2 or line.startswith("#"):
            continue
        if f[1] not in by_exp:
            by_exp[f[1]] = []
            order.append(f[1])
        by_exp[f[1]].append(line)
    # round robin over the experiments, BATCH lines at a time
    msgs, pos = [], {e: 0 for e in order}
    while order:
        for e in list(order):
            chunk = by_exp[e][pos[e]:pos[e] + BATCH]
            pos[e] += len(chunk)
            msgs.append((e, chunk))
            if pos[e] >= len(by_exp[e]):
                order.remove(e)
    return msgs, sum(len(v) for v in by_exp.values())


def totals(ds):
    """(lines, records, partitions owned) of the daemons, summed."""
    lines = records = owned = 0
    for d in ds:
        body = urllib.request.urlopen("http://127.0.0.1:%d/metrics" %
                                      d.http, timeout=60).read().decode()
        lines += sum(int(v) for v in re.findall(
            r'^stopcock_kafka_lines_total\{[^}]*\} (\d+)', body, re.M))
        records += sum(int(v) for v in re.findall(
            r'^stopcock_kafka_records_total\{[^}]*\} (\d+)', body, re.M))
        owned += len(re.findall(r'^stopcock_kafka_partition_owned\{[^}]*'
                                r'state="running"\} 1', body, re.M))
    return lines, records, owned


class Mock:
    """kafkamock: three mock brokers, the topics, and the producer."""

    def __init__(self):
        self.proc = subprocess.Popen(
            [os.path.join(BUILD, "tests", "kafkamock"), "-b", "3", "-t",
             "rec:%d" % NPART, "-t", "st:%d" % NPART],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE,
            stderr=subprocess.DEVNULL, text=True, bufsize=1 << 20)
        head = self.proc.stdout.readline().split()
        if len(head) != 2 or head[0] != "bootstrap":
            raise RuntimeError("kafkamock did not start: %r" % head)
        self.bootstrap = head[1]

    def produce(self, msgs):
        for key, lines in msgs:
            self.proc.stdin.write("msg %s %d\n%s\n" % (key, len(lines),
                                                       "\n".join(lines)))
        self.proc.stdin.write("flush\n")
        self.proc.stdin.flush()
        for _ in msgs:
            if self.proc.stdout.readline().strip() != "ok":
                raise RuntimeError("kafkamock refused a message")
        flushed = self.proc.stdout.readline().split()
        if flushed != ["flushed", str(len(msgs)), "0"]:
            raise RuntimeError("kafkamock: %r" % flushed)

    def close(self):
        try:
            self.proc.stdin.write("quit\n")
            self.proc.stdin.flush()
            self.proc.wait(timeout=30)
        except Exception:
            self.proc.kill()
            self.proc.wait()


def run(group, n, msgs, want_lines):
    """A fresh cluster; n daemons join and settle (every partition owned,
    no rebalance left), then the messages are produced: the clock runs
    from the first message sent until the daemons read the last line."""
    mock = Mock()
    ds = []
    try:
        for i in range(n):
            d = Daemon("bench-kafka-%s-%d" % (group, i), tcp=False,
                       udp=False, unix=False, http=True, conf="",
                       start=False, args=tuple(os.environ.get(
                           "BENCH_DAEMON_ARGS", "").split()))
            d.write_conf(base_conf + "\n[daemon]\nhttp = 127.0.0.1:%d\n"
                         "state = %s\ntick = 1s\ncheckpoint_every = 5s\n"
                         "\n[kafka]\nbrokers = %s\ntopic = rec\n"
                         "state_topic = st\ngroup = %s\ninstance_id = %s-%d\n"
                         "commit_every = 2s\n" % (d.http, d.state,
                                                  mock.bootstrap, group,
                                                  group, i))
            ds.append(d)
            d.start()
        deadline = time.time() + TIMEOUT
        while totals(ds)[2] != NPART or \
                any(totals([d])[2] == 0 for d in ds):
            if time.time() > deadline:
                raise RuntimeError("group %s never settled" % group)
            time.sleep(0.2)
        time.sleep(2)	# a last rebalance, if one is on its way
        t0 = time.time()
        mock.produce(msgs)
        produced = time.time() - t0
        while True:
            lines, records, owned = totals(ds)
            if lines >= want_lines:
                break
            if time.time() > t0 + TIMEOUT:
                raise RuntimeError("group %s read %d of %d lines in %d s"
                                   % (group, lines, want_lines, TIMEOUT))
            time.sleep(POLL)
        secs = time.time() - t0
        return {"daemons": n, "lines": lines, "records_applied": records,
                "seconds": round(secs, 3),
                "produce_seconds": round(produced, 3),
                "records_per_second": round(records / secs)}
    finally:
        for d in ds:
            d.stop()
        mock.close()


def main():
    msgs, nlines = generate()
    one = run("bench-one", 1, msgs, nlines)
    three = run("bench-three", 3, msgs, nlines)
    print(json.dumps({
        "records": nlines, "messages": len(msgs), "partitions": NPART,
        "brokers": 3, "one": one, "three": three,
        "ratio": round(three["records_per_second"] /
                       one["records_per_second"], 3),
        "same_records": one["records_applied"] == three["records_applied"],
    }, indent=2))


if __name__ == "__main__":
    main()
