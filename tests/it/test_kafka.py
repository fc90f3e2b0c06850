"""stopcockd's Kafka input against librdkafka's mock cluster.

There is no Kafka broker in Debian and no Python Kafka client, so
build/tests/kafkamock (tests/tools/kafkamock.c) is both the cluster (three
mock brokers on loopback that speak the Kafka protocol, with consumer
groups and transactions) and the producer this test drives. The daemons
under test are the real stopcockd.

Invented scenario: a bakery's web shop runs a dozen experiments at once
(new basket page, cheaper delivery banner, ...) and watches the share of
failed checkouts on each.

 1. One daemon owns all 8 partitions; it is killed with SIGKILL while
    records flow, just after it read part of a batch, and restarted with
    the same group.instance.id. In the end every experiment's exposures
    and failed-checkout sums equal the produced ones exactly (no loss, no
    double count), and so do the messages counted per partition, which
    travel in the partition's state. One experiment's records travel
    under another's key (a stray): it lives in that partition's engine
    and comes back whole with its state.
 2. A second daemon joins the group: the partitions split between the
    two (disjoint, together all 8); more records flow; each experiment
    lives in exactly one daemon, with its whole tally, and the union of
    the two daemons' tallies is the produced one, exactly.
    `stopcock status` with both --url merges them (each experiment
    once, with its daemon; each daemon's partitions), shows one
    experiment from its owner, calls out an experiment a daemon outside
    the group also holds (a split), and reports a daemon that does not
    answer (exit 74) while still showing the other.
 3. A rolling restart: the second daemon is stopped (SIGTERM) and
    started again with its group.instance.id; the tallies stay exact.
    The mock cluster has no static membership, so "no rebalance" is
    shown, not asserted (see the diagnostic line).
 4. The second daemon is frozen (SIGSTOP) past its session timeout: the
    first takes its partitions over (fencing its transactional ids);
    records flow; the frozen one is resumed (SIGCONT) and changes
    nothing: the tallies stay exact, its late commits are refused.
 5. A group whose partition 0 has a committed offset but no state: the
    daemon refuses that partition loudly (logged, counted, not consumed)
    and runs the others.
 6. Three daemons on 16 partitions (two seeds): SIGKILLs at random
    moments and a broker down for 2 s while records flow (5% of the
    messages carry a bad line); then every experiment lives in one
    daemon, the union of their tallies equals the produced records
    exactly, and the records applied and rejected they count per
    partition equal one `stopcock replay` of the same lines.
 Every /metrics page along the way parses as Prometheus text
 (prometheus_client's parser, an outside reader).
"""
import http.client
import json
import os
import random
import re
import signal
import subprocess
import threading
import time

from prometheus_client.parser import text_string_to_metric_families

from _lib import Tap, Daemon, wait_for, replay, BUILD, OUT, STOPCOCK

KAFKAMOCK = os.path.join(BUILD, "tests", "kafkamock")
NPART = 8
GUARDRAILS = """
[guardrail failed_checkout]
metric = failed_checkout
test = proportion
harm = increase
margin = 0
"""
STRAY = "shop_gift_cards"
EXPS = ["shop_%s" % n for n in (
    "basket_page", "delivery_banner", "pastry_photos", "search_box",
    "loyalty_nudge", "checkout_steps", "gift_wrap", "pickup_slots",
    "bread_subscription", "recipe_cards", "cake_builder", "night_menu")]


class Mock:
    """kafkamock: the cluster, the producer and an offset committer."""

    def __init__(self, nparts=NPART, name="kafka-mock"):
        self.log = open(os.path.join(OUT, name + ".log"), "w")
        self.proc = subprocess.Popen(
            [KAFKAMOCK, "-b", "3", "-t", "rec:%d" % nparts,
             "-t", "st:%d" % nparts, "-t", "st2:%d" % nparts],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=self.log,
            text=True, bufsize=1)
        line = self.proc.stdout.readline().split()
        if len(line) != 2 or line[0] != "bootstrap":
            raise RuntimeError("kafkamock did not start: %r" % line)
        self.bootstrap = line[1]
        self.sent = 0
        self.lock = threading.Lock()

    def cmd(self, line, payload=()):
        with self.lock:	# the producer thread and the test share it
            self.proc.stdin.write(line + "\n")
            for p in payload:
                self.proc.stdin.write(p + "\n")
            self.proc.stdin.flush()
            return self.proc.stdout.readline().strip()

    def send(self, key, lines):
        r = self.cmd("msg %s %d" % (key, len(lines)), lines)
        if r != "ok":
            raise RuntimeError("kafkamock: %s" % r)
        self.sent += 1

    def flush(self):
        """(delivered, failed) since the start."""
        r = self.cmd("flush").split()
        return int(r[1]), int(r[2])

    def close(self):
        try:
            self.cmd("quit")
            self.proc.wait(timeout=20)
        except Exception:
            self.proc.kill()
            self.proc.wait()
        self.log.close()


def kafka_daemon(name, mock, group, instance, state_topic="st",
                 commit_every="200ms", guardrails=GUARDRAILS, extra=""):
    d = Daemon(name, tcp=False, udp=False, unix=False, http=True,
               conf="", start=False)
    d.write_conf(
        "[defaults]\nalpha = 0.05\nplan_units = 2000\nlateness = 0\n"
        "srm_interval = 1ms\n" + guardrails + extra +
        "\n[daemon]\nstate = %s\ntick = 200ms\ncheckpoint_every = 1s\n"
        "http = 127.0.0.1:%d\n" % (d.state, d.http) +
        "\n[kafka]\nbrokers = %s\ntopic = rec\nstate_topic = %s\n"
        "group = %s\ninstance_id = %s\ncommit_every = %s\n"
        # the test's producer does not sign: its input is trusted
        # explicitly, so pauses (test_kafka_spool) rest on trusted records
        "session_timeout = 6s\ntrusted = yes\n" % (mock.bootstrap,
                                                    state_topic, group,
                                    instance, commit_every))
    d.start()
    return d


def get(d, path):
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", path)
        r = c.getresponse()
        return r.status, r.read().decode()
    finally:
        c.close()


PARSE_ERRORS = []


def metrics(d):
    """[(name, {label: value}, value)] of the daemon's /metrics."""
    st, body = get(d, "/metrics")
    try:
        list(text_string_to_metric_families(body))
    except Exception as e:	# noted, asserted at the end
        PARSE_ERRORS.append(str(e))
    out = []
    for line in body.splitlines():
        if not line or line.startswith("#"):
            continue
        head, val = line.rsplit(" ", 1)
        labels = {}
        if "{" in head:
            name, rest = head.split("{", 1)
            for kv in rest.rstrip("}").split(","):
                k, v = kv.split("=", 1)
                labels[k] = v.strip('"')
        else:
            name = head
        out.append((name, labels, float(val)))
    return out


def partitions(d, state="running"):
    if not d.alive():
        return set()
    return {int(l["partition"]) for n, l, v in metrics(d)
            if n == "stopcock_kafka_partition_owned" and l["state"] == state}


def messages(d):
    if not d.alive():
        return 0
    return sum(v for n, l, v in metrics(d)
               if n == "stopcock_kafka_messages_total")


def uncommitted(d):
    """Messages read but not yet committed with their partition's state."""
    off = {}
    for n, l, v in metrics(d):
        if n == "stopcock_kafka_partition_offset":
            off.setdefault(l["partition"], {})[l["kind"]] = v
    return sum(max(o["read"], 0) - max(o["committed"], 0)
               for o in off.values())


def tallies(d):
    """{(exp, arm): [exposures, k, n]} of every experiment the daemon has."""
    st, body = get(d, "/api/experiments")
    out = {}
    for e in json.loads(body)["experiments"]:
        st, one = get(d, "/api/experiments/" + e["id"])
        one = json.loads(one)
        for a in e["arms"]:
            out[(e["id"], a["variant"])] = [a["exposures"], 0, 0]
        for t in one.get("tests", []):
            if t["guardrail"] != "failed_checkout":
                continue
            for a in t["arms"]:
                out[(e["id"], a["variant"])][1:] = [a["k"], a["n"]]
    return out


class Feed:
    """Generated records, counted on the way out as the reference."""

    def __init__(self, mock, seed, bad_rate=0.0, carriers=None, exps=EXPS):
        self.mock = mock
        self.carriers = carriers or {}	# experiment -> the key it goes by
        self.exps = exps
        self.rng = random.Random(seed)
        self.want = {}
        self.planned = set()
        self.bad_rate = bad_rate
        self.lines = []		# every line sent, for stopcock replay

    def message(self, exp):
        lines = []
        if exp not in self.planned:
            lines.append("plan %s control=50 treatment=50" % exp)
            self.planned.add(exp)
            for arm in ("control", "treatment"):
                self.want[(exp, arm)] = [0, 0, 0]
        for _ in range(self.rng.randint(1, 6)):
            arm = self.rng.choice(("control", "treatment"))
            k = 1 if self.rng.random() < 0.1 else 0
            lines.append("expose %s %s" % (exp, arm))
            lines.append("count %s %s failed_checkout %d 1" % (exp, arm, k))
            w = self.want[(exp, arm)]
            w[0] += 1
            w[1] += k
            w[2] += 1
        if self.rng.random() < self.bad_rate:	# a variant without a name
            lines.append("expose %s" % exp)
        self.lines += lines
        self.mock.send(self.carriers.get(exp, exp), lines)

    def batch(self, n):
        for _ in range(n):
            self.message(self.rng.choice(self.exps))
        return self.mock.flush()


def url(d):
    return d if isinstance(d, str) else "http://127.0.0.1:%d" % d.http


def status(*ds, args=()):
    """stopcock status --url D... ARGS: (exit status, stdout, stderr)."""
    cmd = [STOPCOCK, "status"]
    for d in ds:
        cmd += ["--url", url(d)]
    p = subprocess.run(cmd + list(args), capture_output=True, text=True,
                       timeout=60, env=dict(os.environ, NO_COLOR="1"))
    return p.returncode, p.stdout, p.stderr


def status_checks(tap, a, b, ea, eb):
    """stopcock status merging the two daemons of one group, then a
    daemon outside the group that holds one of their experiments too (a
    split), then one that does not answer."""
    rc, out, err = status(a, b, args=["--json"])
    j = json.loads(out) if rc == 0 else {}
    owner = {e["id"]: e["daemon"] for e in j.get("experiments", [])}
    want = dict([(e, url(a)) for e in ea] + [(e, url(b)) for e in eb])
    tap.ok((rc, owner, j.get("split")) == (0, want, []),
           "stopcock status with two --url merges them: every experiment "
           "once, named with its daemon, no split",
           "rc=%d err=%r split=%r" % (rc, err, j.get("split")))
    tap.eq([sorted(p["partition"] for p in x["kafka"]["partitions"])
            for x in j.get("daemons", [])],
           [sorted(partitions(a)), sorted(partitions(b))],
           "and says which partitions each daemon owns")
    rc, out, err = status(a, b)
    head = [l for l in out.splitlines() if l.startswith("daemon ")]
    tap.ok(rc == 0 and len(head) == 2 and
           head[1].startswith("daemon %s: %d experiments, partitions" %
                              (url(b), len(eb))),
           "the table opens with one line per daemon", repr(head))
    one = sorted(eb)[0]
    rc, out, err = status(a, b, args=[one])
    tap.ok(rc == 0 and out.startswith("at %s\n" % url(b)),
           "one experiment is shown from the daemon that holds it",
           "rc=%d out=%r err=%r" % (rc, out[:80], err))
    # the same experiment fed to a daemon outside the group: a split
    plain = Daemon("kafka-plain", udp=False, unix=False, http=True)
    try:
        plain.send_tcp(["plan %s control=50 treatment=50" % one,
                        "expose %s control" % one])
        wait_for(lambda: tallies(plain), 10)
        rc, out, err = status(b, plain, args=["--json"])
        tap.ok(rc == 0 and json.loads(out)["split"] == [one] and
               "is held by 2 daemons" in err,
               "an experiment two daemons hold is called out (split)",
               "rc=%d err=%r" % (rc, err))
    finally:
        plain.close()
    rc, out, err = status(a, "http://127.0.0.1:1")
    tap.ok(rc == 74 and out.count("daemon ") == 1 and
           len([l for l in out.splitlines() if l.startswith("shop_")]) ==
           len(ea) and "127.0.0.1:1" in err,
           "a daemon that does not answer is reported (exit 74), the "
           "others still shown", "rc=%d err=%r" % (rc, err))


def compare(tap, got, want, name):
    bad = [(k, got.get(k), w) for k, w in sorted(want.items())
           if got.get(k) != w]
    extra = sorted(set(got) - set(want))
    tap.ok(not bad and not extra, name,
           "first differences: %r; unexpected: %r" % (bad[:4], extra[:4]))


def chaos(tap, seed, nparts=16):
    """Three daemons, 16 partitions, SIGKILLs at random moments and a
    broker down and up while records flow; then the union of the
    daemons' tallies equals the produced records exactly, and the
    records and rejections they counted equal one `stopcock replay` of
    the same lines."""
    rng = random.Random(seed)
    mock = Mock(nparts, "kafka-mock-chaos-%d" % seed)
    ds = []
    try:
        feed = Feed(mock, seed=seed, bad_rate=0.05)
        for i in range(3):
            ds.append(kafka_daemon("kafka-chaos%d-%d" % (seed, i), mock,
                                   "chaos", "it-chaos-%d" % i,
                                   commit_every="300ms"))
        everything = set(range(nparts))

        def owned_all():
            ps = [partitions(d) for d in ds]
            return sum(len(p) for p in ps) == nparts and \
                set().union(*ps) == everything

        tap.ok(wait_for(owned_all, 60), "seed %d: three daemons share the "
               "%d partitions" % (seed, nparts))

        # three shops' worth, so every partition carries a few
        exps = ["%s_%s" % (e, shop) for e in EXPS
                for shop in ("north", "south", "mill")]

        def paced(n):
            for i in range(n):
                feed.message(feed.rng.choice(exps))
                if i % 20 == 19:
                    feed.mock.flush()
                    time.sleep(0.1)
            feed.mock.flush()
        producer = threading.Thread(target=paced, args=(1200,))
        producer.start()
        kills = 0
        while producer.is_alive() and kills < 6:
            time.sleep(rng.uniform(0.5, 2.0))
            victim = rng.choice(ds)
            if not victim.alive():
                continue
            victim.kill9()
            kills += 1
            if kills == 2:	# and a broker goes down for 2 s meanwhile
                tap.eq(mock.cmd("bounce 2 2000"), "ok", "seed %d: broker 2 "
                       "down for 2 s" % seed)
            time.sleep(rng.uniform(0, 1.0))
            victim.start()
        producer.join()
        for d in ds:
            if not d.alive():
                d.start()
        total = mock.sent
        tap.eq(mock.flush(), (total, 0), "seed %d: all %d messages "
               "delivered to the cluster (the reference counts them all)"
               % (seed, total))
        tap.ok(kills >= 2, "seed %d: %d daemons killed with SIGKILL while "
               "records flowed" % (seed, kills))

        def counted():
            return sum(messages(d) for d in ds)
        if not tap.ok(wait_for(lambda: owned_all() and counted() == total,
                               120),
                      "seed %d: the daemons' partitions count the %d "
                      "messages produced, exactly" % (seed, total),
                      "counted %r" % counted()):
            for i, d in enumerate(ds):
                tap.diag("daemon %d: %s" % (i, " ".join(
                    "%s{%s}=%g" % (n[15:], ",".join(
                        "%s" % v for v in l.values()), v)
                    for n, l, v in metrics(d)
                    if n in ("stopcock_kafka_partition_offset",
                             "stopcock_kafka_partition_lag",
                             "stopcock_kafka_partition_owned"))))
        union, where = {}, {}
        for i, d in enumerate(ds):
            for key, v in tallies(d).items():
                where.setdefault(key[0], set()).add(i)
                union[key] = v
        tap.ok(all(len(w) == 1 for w in where.values()),
               "seed %d: each experiment lives in one daemon" % seed)
        compare(tap, union, feed.want, "seed %d: the union of the three "
                "daemons' tallies equals the produced records" % seed)
        _, summary = replay(ds[0].conf_path, feed.lines)

        def metric_sum(name):
            return sum(v for d in ds for n, l, v in metrics(d) if n == name)
        got = (metric_sum("stopcock_kafka_records_total"),
               metric_sum("stopcock_kafka_rejected_total"))
        tap.eq(got, (float(summary["records"]), float(summary["rejected"])),
               "seed %d: records applied and rejected, per partition and "
               "summed, equal one stopcock replay of the same lines" % seed)
    finally:
        for d in ds:
            d.close()
        mock.close()


def main():
    tap = Tap()
    mock = Mock()
    a = b = c = None
    try:
        # gift cards' records travel under the basket page's key (against
        # the producer contract, but always the same key): a stray
        # experiment, kept in that partition's engine and state
        feed = Feed(mock, seed=14, carriers={STRAY: "shop_basket_page"},
                    exps=EXPS + [STRAY])
        # commits 5 s apart: the kill lands after reads not committed
        a = kafka_daemon("kafka-a", mock, "bakery", "it-a",
                         commit_every="5s")
        tap.ok(wait_for(lambda: partitions(a) == set(range(NPART)), 30),
               "one daemon is assigned all %d partitions" % NPART)

        # 1. kill -9 in the middle of a run, restart, exact tallies
        delivered, failed = feed.batch(300)
        tap.eq((delivered, failed), (300, 0), "300 messages produced")
        tap.ok(wait_for(lambda: messages(a) >= 300 and uncommitted(a) == 0,
                        30), "the daemon read the first 300 messages and "
               "committed them with its partitions' states")

        def paced(n):	# about 100 messages a second
            for i in range(n):
                feed.message(feed.rng.choice(feed.exps))
                if i % 10 == 9:
                    feed.mock.flush()
                    time.sleep(0.1)
            feed.mock.flush()
        producer = threading.Thread(target=paced, args=(300,))
        producer.start()
        wait_for(lambda: messages(a) > 400 and uncommitted(a) > 0, 30, 0.02)
        seen = messages(a)
        a.kill9()
        producer.join()
        tap.ok(400 < seen < 600, "killed with SIGKILL part way through the "
               "second batch (%d of 600 read)" % seen)
        a.start()
        total = mock.sent
        tap.ok(wait_for(lambda: messages(a) == total, 60),
               "after the restart the partitions' message counts add up to "
               "the %d produced, exactly" % total,
               "counted %r" % messages(a))
        compare(tap, tallies(a), feed.want, "exposures and failed-checkout "
                "sums equal the produced ones exactly after SIGKILL")
        compare(tap, {k: v for k, v in tallies(a).items() if k[0] == STRAY},
                {k: v for k, v in feed.want.items() if k[0] == STRAY},
                "the stray experiment (records under another experiment's "
                "key) came back whole with its partition's state")
        tap.eq([v for n, l, v in metrics(a)
                if n == "stopcock_kafka_stray_experiments"], [1.0],
               "and it is counted as a stray")
        restored = [int(m) for m in re.findall(
            r"restored from the state topic .* messages=(\d+)",
            a.log_text())]
        tap.ok(restored and sum(restored) < seen,
               "the restarted daemon rebuilt its partitions from the state "
               "topic, %d messages in, and read the %d after again"
               % (sum(restored), seen - sum(restored)),
               "restored %r, seen %r" % (restored, seen))

        # 2. a second daemon: the partitions split, each owns its own
        b = kafka_daemon("kafka-b", mock, "bakery", "it-b")

        def split():
            pa, pb = partitions(a), partitions(b)
            return pa and pb and not (pa & pb) and \
                pa | pb == set(range(NPART))
        tap.ok(wait_for(split, 60), "two daemons split the %d partitions, "
               "disjoint and complete" % NPART,
               "a=%r b=%r" % (partitions(a), partitions(b)))
        feed.batch(300)
        total = mock.sent
        tap.ok(wait_for(lambda: messages(a) + messages(b) == total, 60),
               "the two daemons' message counts add up to the %d produced"
               % total, "a=%r b=%r" % (messages(a), messages(b)))
        ta, tb = tallies(a), tallies(b)
        ea = {e for e, _ in ta}
        eb = {e for e, _ in tb}
        tap.ok(ea and eb and not (ea & eb), "each experiment lives in one "
               "daemon only", "both: %r" % sorted(ea & eb))
        for name, d, es in (("first", a, ea), ("second", b, eb)):
            k = json.loads(get(d, "/api/health")[1])["kafka"]
            tap.eq(({p["partition"] for p in k["partitions"]},
                    {e for p in k["partitions"] for e in p["experiments"]}),
                   (partitions(d), es), "the %s daemon's /api/health names "
                   "the partitions it owns and exactly the experiments it "
                   "tests" % name)
        union = dict(ta)
        union.update(tb)
        compare(tap, union, feed.want, "the union of the two daemons' "
                "tallies equals the produced records exactly")
        status_checks(tap, a, b, ea, eb)

        def rebalances(d):
            return sum(v for n, l, v in metrics(d)
                       if n == "stopcock_kafka_rebalances_total")

        def both_tallies():
            union = dict(tallies(a))
            union.update(tallies(b))
            return union

        # 3. a rolling restart of b: no rebalance for a
        before = rebalances(a)
        owned_b = partitions(b)
        tap.eq(b.stop(), 0, "the second daemon stops cleanly (SIGTERM)")
        b.start()
        # The mock cluster may hand out other partitions (see below).
        tap.ok(wait_for(lambda: split() and partitions(b), 30),
               "restarted with its instance id, it holds partitions again")
        tap.diag("partitions of the second daemon before and after the "
                 "restart: %r, %r" % (sorted(owned_b),
                                      sorted(partitions(b))))
        feed.batch(100)
        total = mock.sent
        tap.ok(wait_for(lambda: messages(a) + messages(b) == total, 60),
               "the message counts add up after the restart")
        # librdkafka 2.0.2's mock cluster has no static membership
        # (KIP-345): a member that rejoins under its instance id is a new
        # member there, so the first daemon does see a rebalance. Shown,
        # not asserted; a real cluster must show 0.
        tap.diag("rebalances seen by the first daemon during the rolling "
                 "restart: %d (mock cluster; 0 expected on a real one)"
                 % (rebalances(a) - before))
        compare(tap, both_tallies(), feed.want, "tallies exact after the "
                "rolling restart")

        # 4. b frozen past its session timeout, then resumed
        b.signal(signal.SIGSTOP)
        tap.ok(wait_for(lambda: partitions(a) == set(range(NPART)), 60),
               "with the second daemon frozen past its session timeout, "
               "the first takes over all partitions")
        feed.batch(100)
        total = mock.sent
        tap.ok(wait_for(lambda: messages(a) == total, 60),
               "the first daemon alone counts all %d messages" % total)
        b.signal(signal.SIGCONT)
        tap.ok(wait_for(lambda: partitions(a) and partitions(b) and
                        partitions(a) | partitions(b) ==
                        set(range(NPART)) and
                        messages(a) + messages(b) == total, 60),
               "resumed, the second daemon gets partitions again and "
               "the counts still add up to %d" % total,
               "a=%r b=%r" % (messages(a), messages(b)))
        feed.batch(100)
        total = mock.sent
        tap.ok(wait_for(lambda: messages(a) + messages(b) == total, 60),
               "records flow to both again")
        compare(tap, both_tallies(), feed.want, "tallies exact after the "
                "freeze: the stale owner changed nothing")
        blog = b.log_text()
        tap.ok("lost" in blog or "fenced" in blog,
               "the frozen daemon learnt it had lost its partitions")

        # 5. committed offset, no state: refused loudly
        tap.eq(mock.cmd("commit pantry 0 3"), "ok",
               "offset 3 committed for partition 0 of a fresh group")
        c = kafka_daemon("kafka-c", mock, "pantry", "it-c", "st2")
        tap.ok(wait_for(lambda: 0 in partitions(c, "refused"), 30),
               "partition 0 is refused (committed offset, no state)")
        refused = [v for n, l, v in metrics(c)
                   if n == "stopcock_kafka_refused_total" and
                   l["reason"] == "no_state"]
        tap.eq(refused, [1.0], "the refusal is counted (reason no_state)")
        tap.ok(wait_for(lambda: partitions(c) == set(range(1, NPART)), 30),
               "the other partitions run")
        tap.ok("partition REFUSED" in c.log_text(),
               "the refusal is logged")
        tap.ok(not PARSE_ERRORS, "every /metrics page parsed as Prometheus "
               "text", "; ".join(PARSE_ERRORS[:3]))
    finally:
        for d in (a, b, c):
            if d is not None:
                d.close()
        mock.close()
    for seed in os.environ.get("STOPCOCK_KAFKA_SEEDS", "1 2").split():
        chaos(tap, int(seed))
    tap.done()


if __name__ == "__main__":
    main()
