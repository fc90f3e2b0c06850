"""End to end: generated streams through `stopcock replay`.

Streams come from `stopcock generate` (the same generator the simulator
uses), so the truth is known by construction:

  - one arm harmful in exactly one guardrail, for each guardrail kind
    (quantile, proportion, rate, mean): replay fires exactly that harm
    verdict and no other harm, and no SRM;
  - a sample ratio mismatch (units of the treatment lost before exposure
    is logged) fires the SRM check;
  - a correct ramp, 90/10 then 50/50, with no harm fires nothing: no harm
    and no SRM, although the weights changed mid-stream;
  - the invented demo (Larder & Lane's checkout-v2, conf/stopcock.conf)
    fires its one harm (p99 checkout latency) and nothing else;
  - bad lines mixed into a stream are counted by reason and leave the
    verdicts exactly as on the clean stream;
  - exit codes follow sysexits(3): 64 usage, 66 missing input, 78 bad
    configuration;
  - generate is reproducible: the same seed gives the same bytes.
"""
import json
import os
import random
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Tap, STOPCOCK, OUT  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(
    os.path.abspath(__file__))))

CONF = """\
[defaults]
alpha = 0.05
srm_alpha = 0.001
plan_units = 5000

[guardrail lat_p95]
metric = latency_ms
test = quantile
quantile = 0.95
harm = increase
margin = 5%

[guardrail errors]
metric = server_errors
test = proportion
harm = increase
margin = 0

[guardrail crashes]
metric = crashes
test = rate
harm = increase
margin = 0

[guardrail render]
metric = render_ms
test = mean
harm = increase
margin = 0
"""

# Baselines every stream shares (crashes frequent enough to test).
BASE = ["--experiment", "e2e", "--baseline", "crashes=poisson:0.3:1"]

tap = Tap()
tmp = tempfile.mkdtemp(prefix="e2e-", dir=OUT)
conf = os.path.join(tmp, "e2e.conf")
with open(conf, "w") as f:
    f.write(CONF)


def generate(args, name):
    path = os.path.join(tmp, name)
    with open(path, "wb") as f:
        p = subprocess.run([STOPCOCK, "generate"] + args, stdout=f,
                           stderr=subprocess.PIPE, timeout=120)
    if p.returncode != 0:
        raise RuntimeError("generate %s: %s" % (args, p.stderr.decode()))
    return path


def replay(conf_path, path):
    p = subprocess.run([STOPCOCK, "replay", "-q", "-c", conf_path, path],
                       capture_output=True, timeout=300)
    return (p.returncode,
            [json.loads(l) for l in p.stdout.decode().splitlines() if l],
            p.stderr.decode())


def harms(findings):
    return sorted({(f["experiment"], f["guardrail"], f["variant"])
                   for f in findings
                   if f["kind"] == "verdict" and f["verdict"] == "harm"})


def srms(findings):
    return [f for f in findings if f["kind"] == "srm"]


def stable(findings):
    """Findings without their line numbers (bad lines shift them)."""
    out = []
    for f in findings:
        g = dict(f)
        g.pop("event", None)
        out.append(json.dumps(g, sort_keys=True))
    return out


# One harmful guardrail per stream, one stream per test kind.
CASES = [
    ("quantile", "latency_ms=+25%", "lat_p95"),
    ("proportion", "server_errors=+60%", "errors"),
    ("rate", "crashes=+40%", "crashes"),
    ("mean", "render_ms=+4%", "render"),
]
streams = {}
for kind, effect, guardrail in CASES:
    path = generate(["-c", conf] + BASE + ["--records", "50000", "--seed",
                    "7", "--effect", effect], "%s.txt" % kind)
    streams[kind] = path
    rc, found, err = replay(conf, path)
    tap.ok(rc == 0 and harms(found) == [("e2e", guardrail, "treatment")]
           and not srms(found),
           "%s: harm in %s alone fires exactly that verdict" %
           (kind, guardrail),
           "rc %d, harms %s, srm %d\n%s" % (rc, harms(found),
                                             len(srms(found)), err))

# Sample ratio mismatch: a tenth of the treatment's units go missing.
path = generate(["-c", conf] + BASE + ["--records", "50000", "--seed", "7",
                "--srm-loss", "0.1"], "srm.txt")
rc, found, err = replay(conf, path)
tap.ok(rc == 0 and len(srms(found)) == 1 and not harms(found),
       "srm: lost treatment units fire the SRM check and no harm",
       "rc %d, srm %d, harms %s\n%s" % (rc, len(srms(found)), harms(found),
                                         err))

# A correct ramp with no harm: nothing fires.
path = generate(["-c", conf] + BASE + ["--records", "200000", "--seed",
                "11", "--arms", "control=90,treatment=10", "--ramp",
                "0.3:control=50,treatment=50"], "ramp.txt")
rc, found, err = replay(conf, path)
epochs = {f["epoch"] for f in found}
with open(path) as f:
    plans = sum(1 for line in f if " plan " in line)
tap.ok(rc == 0 and plans == 2, "ramp: the stream holds two plans "
       "(90/10, then 50/50)", "plans %d" % plans)
tap.ok(rc == 0 and not harms(found) and not srms(found),
       "ramp 90/10 -> 50/50 without harm fires no harm and no SRM",
       "harms %s, srm %s, epochs %s\n%s" % (harms(found), srms(found),
                                            epochs, err))

# The demo scenario against the shipped example configuration.
demo_conf = os.path.join(ROOT, "conf", "stopcock.conf")
path = generate(["--scenario", "demo"], "demo.txt")
rc, found, err = replay(demo_conf, path)
tap.ok(rc == 0 and harms(found) == [("checkout-v2", "checkout_p99",
                                     "treatment")] and not srms(found),
       "demo: only checkout_p99 (p99 latency +15%) fires harm",
       "rc %d, harms %s, srm %d\n%s" % (rc, harms(found), len(srms(found)),
                                        err))

# A file is mapped, standard input is read through a buffer: the same
# verdicts either way.
with open(path, "rb") as f:
    p = subprocess.run([STOPCOCK, "replay", "-q", "-c", demo_conf, "-"],
                       stdin=f, capture_output=True, timeout=300)
tap.ok(p.returncode == 0 and [json.loads(l) for l in
                              p.stdout.decode().splitlines() if l] == found,
       "replay from standard input equals replay of the file")

# --report: the demo's charts as standalone SVG files for a post-mortem,
# parsed by Python's own XML parser; the harmful test's chart marks the
# verdict and draws the margin line.
import xml.etree.ElementTree as ET  # noqa: E402
rdir = os.path.join(OUT, "replay-report")
os.makedirs(rdir, exist_ok=True)
for f in os.listdir(rdir):
    os.unlink(os.path.join(rdir, f))
p = subprocess.run([STOPCOCK, "replay", "-q", "-c", demo_conf, "--report",
                    rdir, path], capture_output=True, timeout=300)
svgs = sorted(os.listdir(rdir))
want = "checkout-v2-checkout_p99-treatment.svg"
parsed = []
for f in svgs:
    try:
        ET.parse(os.path.join(rdir, f))
        parsed.append(f)
    except ET.ParseError:
        pass
tap.ok(p.returncode == 0 and want in svgs and "checkout-v2-srm.svg" in svgs
       and parsed == svgs, "replay --report writes one well-formed SVG per "
       "test and per SRM check", "rc %d, files %s, parsed %s"
       % (p.returncode, svgs, parsed))
text = open(os.path.join(rdir, want)).read() if want in svgs else ""
tap.ok("margin" in text and "harm" in text,
       "the harmful test's chart shows the margin and the verdict")

# Bad lines change nothing but the counters.
BAD = [
    (b"frobnicate e2e control 1", "bad_kind"),
    (b"observe e2e control render_ms 12x", "bad_number"),
    (b"observe e2e control render_ms nan", "bad_number"),
    (b"count e2e control server_errors 5", "bad_fields"),
    (b"expose e2e contr\xc3\xb6l", "bad_name"),
    (b"observe e2e control " + b"m" * 5000 + b" 1", "too_long"),
    (b'{"kind": 3}', "bad_json"),
    (b"observe e2e control ren\x01der_ms 1", "bad_bytes"),
    (b"observe e2e nosuch render_ms 10", "unknown_variant"),
    (b"expose ghost control", "unplanned"),
    (b"count e2e control server_errors 5 3", "k_exceeds_n"),
]
with open(streams["proportion"], "rb") as f:
    lines = f.read().split(b"\n")
rng = random.Random(5)
dirty = list(lines[:-1])
for bad, _ in BAD * 3:
    # after the plan, anywhere in the stream
    dirty.insert(rng.randrange(1, len(dirty)), bad)
dirty_path = os.path.join(tmp, "dirty.txt")
with open(dirty_path, "wb") as f:
    f.write(b"\n".join(dirty) + b"\n")
rc0, clean_found, _ = replay(conf, streams["proportion"])
rc, dirty_found, err = replay(conf, dirty_path)
tap.ok(rc == 0 and rc0 == 0 and stable(dirty_found) == stable(clean_found)
       and len(clean_found) > 0,
       "bad lines: verdicts identical to the clean stream",
       "clean %s\ndirty %s\n%s" % (stable(clean_found)[:2],
                                   stable(dirty_found)[:2], err))
reasons = {}
for line in err.splitlines():
    if "rejected " in line and ":" in line.split("rejected ", 1)[1]:
        k, v = line.split("rejected ", 1)[1].split(":")
        reasons[k.strip()] = int(v)
want = {}
for _, reason in BAD * 3:
    want[reason] = want.get(reason, 0) + 1
tap.ok(reasons == want, "bad lines: each counted once under its reason",
       "got %s\nwant %s" % (reasons, want))
tap.ok(("%d rejected" % (3 * len(BAD))) in err,
       "bad lines: the summary counts %d rejected" % (3 * len(BAD)), err)

# Exit codes (sysexits): usage 64, no input 66, configuration 78.
bad_conf = os.path.join(tmp, "bad.conf")
with open(bad_conf, "w") as f:
    f.write("[defaults]\nalpha = 2\n")


def rc_of(args):
    return subprocess.run([STOPCOCK] + args, capture_output=True,
                          timeout=60).returncode


for args, want_rc, what in [
        (["replay", "--no-such-option"], 64, "replay, unknown option"),
        (["generate", "--records", "lots"], 64, "generate, bad number"),
        (["simulate", "-c", conf, "--runs", "0"], 64, "simulate, 0 runs"),
        (["generate", "--effect", "nosuch=+5%"], 64,
         "generate, effect on an unknown metric"),
        (["replay", "-c", conf, os.path.join(tmp, "missing.txt")], 66,
         "replay, missing input file"),
        (["replay", "-c", bad_conf, streams["mean"]], 78,
         "replay, bad configuration"),
        (["simulate", "-c", bad_conf], 78, "simulate, bad configuration"),
        (["generate", "-c", bad_conf], 78, "generate, bad configuration")]:
    got = rc_of(args)
    tap.ok(got == want_rc, "exit %d: %s" % (want_rc, what), "got %d" % got)

# Reproducible: same seed, same bytes; another seed, other bytes.
a = generate(["--records", "5000", "--seed", "3"], "a.txt")
b = generate(["--records", "5000", "--seed", "3"], "b.txt")
c = generate(["--records", "5000", "--seed", "4"], "c.txt")
with open(a, "rb") as fa, open(b, "rb") as fb, open(c, "rb") as fc:
    ba, bb, bc = fa.read(), fb.read(), fc.read()
tap.ok(ba == bb and ba != bc and ba.count(b"\n") == 5000,
       "generate: same seed, same stream of exactly --records lines")

tap.done()
