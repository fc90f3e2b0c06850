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
long it took). Beside it, the CPU time the daemons used over the same
interval (user + system, from /proc/PID/stat) and the records applied per
daemon-CPU-second: the cost of the work, which sharing the CPUs with the
mock cluster and the producer does not hide.

  stall: one daemon owns all partitions and reads the messages while
         /api/health is asked every STALL_POLL s (reading: its timer
         commits every partition's state in transactions, on its
         loop); a second daemon joins (join: until the first has given
         up half its partitions, committing them) and leaves (leave:
         until the first has loaded their states back). The longest
         answer says how long the loop stood still.

Prints one JSON object. The daemons, the producer and the mock cluster
share this machine's CPUs: the ratio says what a second and third daemon
add here, not on separate hosts.
"""
import json
import os
import re
import subprocess
import sys
import threading
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
STALL_POLL = 0.01	# s between /api/health asks in the stall phase
CLK_TCK = os.sysconf("SC_CLK_TCK")
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


def cpu_seconds(ds):
    """User + system CPU seconds the daemons' processes have used."""
    total = 0
    for d in ds:
        with open("/proc/%d/stat" % d.proc.pid) as f:
            # the fields after the command name, which may hold spaces
            rest = f.read().rsplit(")", 1)[1].split()
        total += int(rest[11]) + int(rest[12])	# utime, stime
    return total / CLK_TCK


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


def daemon(group, i, mock, start=True):
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
    if start:
        d.start()
    return d


def settle(ds, group):
    """Until every partition is running on one of ds and each owns some."""
    deadline = time.time() + TIMEOUT
    while totals(ds)[2] != NPART or any(totals([d])[2] == 0 for d in ds):
        if time.time() > deadline:
            raise RuntimeError("group %s never settled" % group)
        time.sleep(0.05)


def run(group, n, msgs, want_lines):
    """A fresh cluster; n daemons join and settle (every partition owned,
    no rebalance left), then the messages are produced: the clock runs
    from the first message sent until the daemons read the last line."""
    mock = Mock()
    ds = []
    try:
        for i in range(n):
            ds.append(daemon(group, i, mock))
        settle(ds, group)
        time.sleep(2)	# a last rebalance, if one is on its way
        t0 = time.time()
        cpu0 = cpu_seconds(ds)
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
        cpu = cpu_seconds(ds) - cpu0
        return {"daemons": n, "lines": lines, "records_applied": records,
                "seconds": round(secs, 3),
                "produce_seconds": round(produced, 3),
                "records_per_second": round(records / secs),
                "daemon_cpu_seconds": round(cpu, 3),
                "records_per_cpu_second": round(records / cpu)
                if cpu > 0 else None}
    finally:
        for d in ds:
            d.stop()
        mock.close()


def answer_times(d, stop, out):
    """(time asked, seconds to answer) of /api/health until stop is set."""
    url = "http://127.0.0.1:%d/api/health" % d.http
    while not stop.is_set():
        t = time.time()
        urllib.request.urlopen(url, timeout=60).read()
        out.append((t, time.time() - t))
        time.sleep(STALL_POLL)


def window(samples, t0, t1):
    got = sorted(s for t, s in samples if t0 <= t < t1)
    if not got:
        return None
    return {"asks": len(got), "median_ms": round(got[len(got) // 2] * 1e3, 2),
            "p99_ms": round(got[min(len(got) - 1,
                                    int(len(got) * 0.99))] * 1e3, 2),
            "max_ms": round(got[-1] * 1e3, 2)}


def stall(msgs):
    """One daemon reading; a second joins, then leaves: answer times."""
    mock = Mock()
    ds, stop, samples = [], threading.Event(), []
    try:
        ds.append(daemon("bench-stall", 0, mock))
        settle(ds, "bench-stall")
        time.sleep(2)
        asker = threading.Thread(target=answer_times,
                                 args=(ds[0], stop, samples))
        asker.start()
        producer = threading.Thread(target=mock.produce, args=(msgs,))
        t_read = time.time()
        producer.start()
        time.sleep(3.0)		# the loop busy with records, timer commits
        t_join = time.time()
        ds.append(daemon("bench-stall", 1, mock))
        # the first daemon's half of the rebalance: it commits and gives
        # up half its partitions (the mock cluster may take a minute to
        # hand them to the newcomer; that wait is not the loop's)
        while totals(ds[:1])[2] == NPART:
            if time.time() > t_join + TIMEOUT:
                raise RuntimeError("bench-stall: nothing was revoked")
            time.sleep(0.05)
        t_joined = time.time()
        time.sleep(1.0)
        t_leave = time.time()
        ds[1].stop()
        while totals(ds[:1])[2] != NPART:
            if time.time() > t_leave + 2 * TIMEOUT:
                raise RuntimeError("bench-stall: partitions never came back")
            time.sleep(0.05)
        t_back = time.time()
        time.sleep(0.5)
        producer.join()
        stop.set()
        asker.join()
        return {"reading": window(samples, t_read, t_join),
                "join": window(samples, t_join, t_joined),
                "join_seconds": round(t_joined - t_join, 3),
                "leave": window(samples, t_leave, t_back),
                "leave_seconds": round(t_back - t_leave, 3),
                "poll_s": STALL_POLL}
    finally:
        stop.set()
        for d in ds:
            d.stop()
        mock.close()


def main():
    msgs, nlines = generate()
    one = run("bench-one", 1, msgs, nlines)
    three = run("bench-three", 3, msgs, nlines)
    moves = stall(msgs)
    print(json.dumps({
        "records": nlines, "messages": len(msgs), "partitions": NPART,
        "brokers": 3, "one": one, "three": three, "stall": moves,
        "ratio": round(three["records_per_second"] /
                       one["records_per_second"], 3),
        "same_records": one["records_applied"] == three["records_applied"],
    }, indent=2))


if __name__ == "__main__":
    main()
