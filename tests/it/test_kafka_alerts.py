"""An alert's later life travels with its Kafka partition.

Invented scenario: a cinema chain tries five new pages at once (seat
picker, snack bundle, ...) and watches failed ticket sales; every new
page fails a quarter of them, the old ones 3%, so each raises a harm
alert. Two daemons of one group share the 4 partitions. Of the daemon
that holds at least three of the experiments (H; the other is O):

 1. `stopcock ack` and `stopcock close` with both --url find H (each
    daemon is asked which holds the experiment) and act there only: one
    experiment's alert is acknowledged, one closed, one left raised and
    reminded (remind = 1s). An experiment no daemon holds is an error.
 2. H is killed with SIGKILL; O takes its partitions over and, from
    their states: lists the acknowledged alert as acked with the same id
    and never reminds it, does not list or raise the closed one again,
    and goes on reminding the raised one with the next reminder number.
 3. H starts again (its local state still has the alerts) and the
    partitions split again while O stays alive: every open alert is
    listed by exactly one daemon, the one that holds its experiment; O
    forgot the alerts of the partitions it gave back.

On fb62d65 (no alerts in the partition state) checks of 2 and 3 fail,
and the CLI refuses a second --url. Runs against librdkafka's mock
cluster (tests/tools/kafkamock.c, see test_kafka.py).
"""
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Tap, Daemon, wait_for, STOPCOCK  # noqa: E402
from _alertlib import SECRET, Receiver, harmful_records  # noqa: E402
from test_kafka import Mock, get, partitions, url  # noqa: E402

NPART = 4
TOKEN = "it-kafka-alerts-token-0123456789"
EXPS = ["cinema_%s" % n for n in ("seat_picker", "snack_bundle",
                                  "trailer_autoplay", "member_prices",
                                  "late_shows")]
GUARDRAILS = """
[guardrail failed_sale]
metric = failed_sale
test = proportion
harm = increase
margin = 0
"""


def daemon(name, mock, rcv):
    d = Daemon(name, tcp=False, udp=False, unix=False, http=True,
               conf="", start=False)
    d.write_conf(
        "[defaults]\nalpha = 0.05\nplan_units = 2000\nlateness = 0\n"
        "srm_interval = 1ms\n" + GUARDRAILS +
        "\n[alerts]\nremind = 1s\n"
        "\n[webhook oncall]\nurl = %s\nsecret = %s\n"
        "kinds = harm reminder acknowledged resolved\n" % (rcv.url, SECRET) +
        "\n[daemon]\nstate = %s\ntick = 200ms\ncheckpoint_every = 1s\n"
        "http = 127.0.0.1:%d\nhttp_token = %s\n" % (d.state, d.http, TOKEN) +
        "\n[kafka]\nbrokers = %s\ntopic = rec\nstate_topic = st\n"
        "group = cinema\ninstance_id = it-%s\ncommit_every = 200ms\n"
        "session_timeout = 6s\ntrusted = yes\n" % (mock.bootstrap, name))
    d.start()
    return d


def alerts(d):
    """{experiment: alert} of the daemon's /api/alerts."""
    if not d.alive():
        return {}
    st, body = get(d, "/api/alerts")
    j = json.loads(body)
    lst = j.get("alerts", []) if isinstance(j, dict) else j
    return {a["experiment"]: a for a in lst}


def held(d):
    """Experiments the daemon's partitions hold (its /api/health)."""
    if not d.alive():
        return set()
    st, body = get(d, "/api/health")
    k = json.loads(body).get("kafka") or {}
    return {e for p in k.get("partitions", []) for e in p["experiments"]}


def cli(*args):
    env = {k: v for k, v in os.environ.items()
           if k not in ("STOPCOCK_TOKEN", "STOPCOCK_URL")}
    return subprocess.run([STOPCOCK] + list(args) + ["--token", TOKEN],
                          capture_output=True, text=True, timeout=60,
                          env=env)


def reqs(rcv, typ, exp=None):
    return [r for r in rcv.snapshot()
            if (r["json"] or {}).get("type") == typ and
            (exp is None or r["json"].get("experiment") == exp)]


def main():
    tap = Tap()
    mock = Mock(NPART, "kafka-mock-alerts")
    rcv = Receiver()
    ds = []
    try:
        a = daemon("kafka-alerts-a", mock, rcv)
        b = daemon("kafka-alerts-b", mock, rcv)
        ds += [a, b]
        tap.ok(wait_for(lambda: partitions(a) | partitions(b) ==
                        set(range(NPART)) and partitions(a) and
                        partitions(b) and
                        not partitions(a) & partitions(b), 60),
               "two daemons share the %d partitions" % NPART)
        for n, exp in enumerate(EXPS):
            lines = harmful_records(exp, "failed_sale", 400, 0.03, 0.25,
                                    11 + n)
            for i in range(0, len(lines), 40):
                mock.send(exp, lines[i:i + 40])
        mock.flush()
        tap.ok(wait_for(lambda: set(alerts(a)) | set(alerts(b)) ==
                        set(EXPS), 40),
               "every experiment raised a harm alert")
        h, o = (a, b) if len(held(a) & set(EXPS)) >= 3 else (b, a)
        mine = sorted(held(h) & set(EXPS))
        exp_ack, exp_close, exp_open = mine[:3]
        ids = {e: alerts(h)[e]["id"] for e in mine}
        tap.ok(set(mine) <= set(alerts(h)) and
               not set(mine) & set(alerts(o)),
               "the alerts of an experiment are listed by its daemon only")

        # 1. the CLI finds the holder among two --url
        p = cli("ack", "--url", url(a), "--url", url(b), exp_ack,
                "failed_sale", "treatment")
        tap.ok(p.returncode == 0 and p.stdout.strip().endswith(
            "at " + url(h)), "stopcock ack with two --url acknowledges "
            "on the daemon that holds the experiment",
            "rc=%d out=%r err=%r" % (p.returncode, p.stdout, p.stderr))
        p = cli("close", "--url", url(b), "--url", url(a), exp_close,
                "failed_sale", "treatment")
        tap.ok(p.returncode == 0 and p.stdout.strip().endswith(
            "at " + url(h)), "stopcock close with two --url closes there",
            "rc=%d out=%r err=%r" % (p.returncode, p.stdout, p.stderr))
        p = cli("ack", "--url", url(a), "--url", url(b), "cinema_nowhere",
                "failed_sale", "treatment")
        tap.ok(p.returncode == 66 and "none of the 2 daemons" in p.stderr,
               "an experiment no daemon holds is an error (exit 66)",
               "rc=%d err=%r" % (p.returncode, p.stderr))
        n_ack = len(reqs(rcv, "stopcock.alert.reminder", exp_ack))
        tap.eq((alerts(h).get(exp_ack, {}).get("state"),
                exp_close in alerts(h)), ("acked", False),
               "the holder shows one alert acknowledged, the other gone")
        tap.ok(wait_for(lambda: [r for r in reqs(
            rcv, "stopcock.alert.reminder", exp_open)
            if r["json"]["reminder"] >= 2], 10),
            "the alert left raised is reminded (twice)")
        time.sleep(0.3)	# the reminder's commit
        rem = reqs(rcv, "stopcock.alert.reminder", exp_open)
        n_open = len(rem)
        last_r = max(r["json"]["reminder"] for r in rem)

        # 2. the holder dies; the other takes its partitions over
        h.kill9()
        tap.ok(wait_for(lambda: partitions(o) == set(range(NPART)), 60),
               "the holder killed with SIGKILL, the other daemon takes "
               "its partitions over")
        tap.ok(wait_for(lambda: set(mine) <= held(o), 30),
               "and holds its experiments")
        t0 = time.time()
        got = alerts(o)
        tap.eq((got.get(exp_ack, {}).get("state"),
                got.get(exp_ack, {}).get("id")), ("acked", ids[exp_ack]),
               "the new owner shows the acknowledged alert acked, same id")
        tap.eq(got.get(exp_open, {}).get("id"), ids[exp_open],
               "and the raised one with its id")
        tap.ok(exp_close not in got, "the closed alert is not listed")
        tap.ok(wait_for(lambda: [r for r in reqs(
            rcv, "stopcock.alert.reminder", exp_open)
            if r["json"]["reminder"] > last_r], 10),
            "the new owner goes on reminding the raised alert")
        time.sleep(max(0, 3 - (time.time() - t0)))
        tap.eq(len(reqs(rcv, "stopcock.alert.reminder", exp_ack)), n_ack,
               "no reminder for the acknowledged alert since its ack")
        raised_c = reqs(rcv, "stopcock.alert.raised", exp_close)
        tap.eq(len(raised_c), 1, "the closed alert was raised once only")
        new_r = [r["json"]["reminder"] for r in reqs(
            rcv, "stopcock.alert.reminder", exp_open)[n_open:]]
        # one sent after the old owner's last commit may come again, with
        # its webhook-id (at least once); none restarts the count
        tap.ok(new_r and min(new_r) >= last_r and max(new_r) > last_r,
               "the new owner's reminders go on from the old owner's "
               "number (%d)" % last_r, repr(new_r))

        # 3. the holder back; the partitions split again, O alive
        h.start()
        tap.ok(wait_for(lambda: partitions(h) and partitions(o) and
                        partitions(h) | partitions(o) == set(range(NPART)),
                        60), "the killed daemon restarts and the "
               "partitions split again")
        time.sleep(1)

        def each_once():
            la, lb = alerts(h), alerts(o)
            ha, hb = held(h), held(o)
            open_ = set(EXPS) - {exp_close}
            return (set(la) | set(lb) == open_ and not set(la) & set(lb)
                    and set(la) <= ha and set(lb) <= hb)
        ok = wait_for(each_once, 15)
        tap.ok(ok, "every open alert is listed by exactly one daemon, the "
               "one that holds its experiment",
               "h lists %r holds %r; o lists %r holds %r" % (
                   sorted(alerts(h)), sorted(held(h)), sorted(alerts(o)),
                   sorted(held(o))))
        moved = held(h) & set(EXPS)
        tap.eq("alerts left with the partition" in o.log_text(),
               bool(moved), "the daemon that gave partitions back says it "
               "forgot their alerts exactly when they held some (%s)" %
               (sorted(moved) or "none"))
        allid = {e: x["id"] for d in (h, o) for e, x in alerts(d).items()}
        tap.eq(allid.get(exp_ack), ids[exp_ack], "ids stay stable")
    finally:
        for d in ds:
            d.close()
        rcv.close()
        mock.close()
    tap.done()


if __name__ == "__main__":
    main()
