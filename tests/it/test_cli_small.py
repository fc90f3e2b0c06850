"""test_cli_small: the smaller operator-facing items of issue 13, point 9,
run against the real binaries.

  - `stopcock check-config` refuses a file `stopcockd -t` refuses (no
    input), with the same message, and both accept it once it has one;
  - `stopcock replay --report DIR` with a DIR that does not exist fails
    before it replays anything (no verdict line on stdout);
  - `--version` on both binaries prints "NAME VERSION";
  - `stopcockd -h` says what -c, -d, -f and -t do;
  - a [webhook] kinds list with an unknown word is refused at its line,
    and every word the README documents is accepted.

Invented scenario: a bakery's guardrail on oven temperature.
"""
import os
import re
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import STOPCOCK, STOPCOCKD, Tap  # noqa: E402

BASE = """[guardrail oven]
metric = oven_temp
test = mean
harm = increase

[daemon]
state = %s
"""


def run(*args, stdin=None):
    return subprocess.run(list(args), input=stdin, capture_output=True,
                          text=True, timeout=60)


def main():
    tap = Tap()
    tmp = tempfile.mkdtemp(prefix="stopcock-cli-small-")
    path = os.path.join(tmp, "stopcock.conf")
    with open(path, "w") as f:
        f.write(BASE % os.path.join(tmp, "state"))

    t = run(STOPCOCKD, "-t", "-c", path)
    c = run(STOPCOCK, "check-config", path)
    tap.ok(t.returncode != 0, "stopcockd -t refuses a file with no input",
           t.stderr)
    tap.ok(c.returncode == t.returncode and "configuration OK" not in
           c.stdout, "check-config refuses it too, with the same status",
           "%d %r" % (c.returncode, c.stdout))
    tap.ok("no input" in c.stderr and c.stderr.splitlines()[0] ==
           t.stderr.splitlines()[0], "check-config says why, as -t does",
           c.stderr)
    with open(path, "a") as f:
        f.write("tcp = 127.0.0.1:7799\n")
    t = run(STOPCOCKD, "-t", "-c", path)
    c = run(STOPCOCK, "check-config", path)
    tap.eq((t.returncode, c.returncode), (0, 0),
           "with an input both accept it")

    # A kinds list with a word that is no kind is refused with its line.
    bad = os.path.join(tmp, "kinds.conf")
    with open(bad, "w") as f:
        f.write(open(path).read() + "\n[webhook ops]\nurl = "
                "http://127.0.0.1:9/hook\nkinds = harm resolved harmful\n")
    nline = open(bad).read().splitlines().index(
        "kinds = harm resolved harmful") + 1
    c = run(STOPCOCK, "check-config", bad)
    t = run(STOPCOCKD, "-t", "-c", bad)
    tap.ok(c.returncode != 0 and t.returncode != 0 and
           ("%s:%d:" % (bad, nline)) in c.stderr and "harmful" in c.stderr,
           "kinds: an unknown word is refused as file:line, naming it",
           c.stderr)
    with open(bad, "w") as f:
        f.write(open(path).read() + "\n[webhook ops]\nurl = "
                "http://127.0.0.1:9/hook\nkinds = harm srm pause_dry_run "
                "reminder acknowledged resolved safe pause\n")
    c = run(STOPCOCK, "check-config", bad)
    tap.eq(c.returncode, 0, "kinds: every documented word is accepted")

    records = "plan bake control=50 crisp=50\n" + "".join(
        "observe bake %s oven_temp %d\n" % (("control", "crisp")[i % 2],
                                            180 + i % 7)
        for i in range(2000))
    missing = os.path.join(tmp, "no-such-dir")
    r = run(STOPCOCK, "replay", "-q", "-c", path, "--report", missing,
            stdin=records)
    tap.ok(r.returncode != 0 and missing in r.stderr,
           "replay --report to a missing directory fails, naming it",
           "%d %r" % (r.returncode, r.stderr))
    tap.eq(r.stdout, "", "and it fails before replaying (nothing on stdout)")
    os.mkdir(missing)
    r = run(STOPCOCK, "replay", "-q", "-c", path, "--report", missing,
            stdin=records)
    tap.ok(r.returncode == 0 and any(n.endswith(".svg")
                                     for n in os.listdir(missing)),
           "with the directory there, the report is written", r.stderr)

    for binary, name in ((STOPCOCKD, "stopcockd"), (STOPCOCK, "stopcock")):
        v = run(binary, "--version")
        tap.ok(v.returncode == 0 and re.match(r"^%s \d+\.\d+\.\d+\S*\n$" %
                                             name, v.stdout),
               "%s --version prints its name and version" % name,
               repr(v.stdout))

    h = run(STOPCOCKD, "-h")
    lines = h.stdout.splitlines()
    for opt, word in (("-c", "configuration"), ("-d", "debug"),
                      ("-f", "stderr"), ("-t", "check")):
        tap.ok([ln for ln in lines if ln.strip().startswith(opt + " ") and
                word in ln], "stopcockd -h says what %s does" % opt)
    tap.done()


if __name__ == "__main__":
    main()
