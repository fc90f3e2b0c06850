"""test_install: `make install` into a DESTDIR and `make uninstall` out of
it, with the real Makefile, and the pause audit log's rotation against a
real daemon.

  - install puts the binaries, the three man pages, the systemd unit, the
    sysusers file, the logrotate snippet and a configuration in place;
  - each man page renders without a warning (`man --warnings -l`, whose
    troff warnings go to stderr) and lexgrog reads its NAME line;
  - the configuration installed is the neutral template: stopcockd -t
    accepts it and it names no guardrail of the demo's scenario;
  - the logrotate snippet rotates STATE/pause-audit.log and signals HUP
    (logrotate -d parses it when logrotate is installed);
  - a daemon whose audit log was renamed (as logrotate does) writes a new
    one by the same name after SIGHUP;
  - uninstall removes every file install put there but the configuration.
"""
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import BUILD, STOPCOCKD, Daemon, Tap, wait_for  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(
    os.path.abspath(__file__))))
PAGES = ["usr/share/man/man1/stopcock.1",
         "usr/share/man/man5/stopcock.conf.5",
         "usr/share/man/man8/stopcockd.8"]
FILES = ["usr/bin/stopcock", "usr/sbin/stopcockd",
         "usr/lib/systemd/system/stopcockd.service",
         "usr/lib/sysusers.d/stopcock.conf", "etc/logrotate.d/stopcock",
         "etc/stopcock/stopcock.conf"] + PAGES


def make(dest, target):
    return subprocess.run(["make", "-s", "--no-print-directory",
                           "BUILD=" + os.path.abspath(BUILD), target,
                           "PREFIX=/usr", "DESTDIR=" + dest], cwd=ROOT,
                          capture_output=True, text=True, timeout=600)


def main():
    tap = Tap()
    dest = tempfile.mkdtemp(prefix="stopcock-install-")
    r = make(dest, "install")
    tap.eq(r.returncode, 0, "make install into a DESTDIR")
    tap.eq([f for f in FILES if not os.path.isfile(os.path.join(dest, f))],
           [], "every file is installed", )
    for page in PAGES:
        path = os.path.join(dest, page)
        m = subprocess.run(["man", "--warnings", "-l", path],
                           capture_output=True, text=True, timeout=60,
                           env=dict(os.environ, MANWIDTH="80",
                                    MAN_KEEP_FORMATTING="0"))
        plain = re.sub(".\b", "", m.stdout)	# bold as overstrikes
        tap.ok(m.returncode == 0 and m.stderr.strip() == "" and
               "NAME" in plain, "%s renders without a warning"
               % os.path.basename(page), m.stderr[:500])
        lg = subprocess.run(["lexgrog", path], capture_output=True,
                            text=True, timeout=60)
        tap.ok(lg.returncode == 0 and " - " in lg.stdout,
               "lexgrog reads the NAME of %s" % os.path.basename(page),
               lg.stdout + lg.stderr)
    conf = os.path.join(dest, "etc/stopcock/stopcock.conf")
    t = subprocess.run([STOPCOCKD, "-t", "-c", conf], capture_output=True,
                       text=True, timeout=60)
    tap.ok(t.returncode == 0, "stopcockd -t accepts the installed "
           "configuration", t.stderr)
    text = open(conf).read()
    demo = open(os.path.join(ROOT, "conf", "stopcock.conf")).read()
    demo_guardrails = [ln.split()[1].rstrip("]") for ln in
                       demo.splitlines() if ln.startswith("[guardrail ")]
    tap.ok(demo_guardrails and not any(g in text for g in demo_guardrails)
           and "\n[guardrail" not in text,
           "it is the neutral template, not the demo's scenario",
           repr(demo_guardrails))
    lr = open(os.path.join(dest, "etc/logrotate.d/stopcock")).read()
    tap.ok("/var/lib/stopcock/pause-audit.log" in lr and "HUP" in lr,
           "logrotate snippet: the audit log, then SIGHUP")
    if shutil.which("logrotate"):
        st = os.path.join(dest, "lr.state")
        d = subprocess.run(["logrotate", "-d", "-s", st, os.path.join(
            dest, "etc/logrotate.d/stopcock")], capture_output=True,
            text=True, timeout=60)
        tap.ok(d.returncode == 0 and "error" not in d.stderr.lower(),
               "logrotate -d parses it", d.stderr[-500:])

    with Daemon("install-hup", udp=False, unix=False) as dm:
        audit = os.path.join(dm.state, "pause-audit.log")
        tap.ok(os.path.exists(audit), "the daemon keeps an audit log")
        os.rename(audit, audit + ".1")
        dm.signal(signal.SIGHUP)
        tap.ok(wait_for(lambda: os.path.exists(audit), 10),
               "after a rename and SIGHUP it opens a new one by name")

    r = make(dest, "uninstall")
    left = sorted(os.path.relpath(os.path.join(p, f), dest)
                  for p, _, fs in os.walk(dest) for f in fs
                  if not f.startswith("lr.state"))
    tap.ok(r.returncode == 0 and left == ["etc/stopcock/stopcock.conf"],
           "make uninstall removes all but the configuration", repr(left)
           + r.stderr)
    shutil.rmtree(dest, ignore_errors=True)
    tap.done()


if __name__ == "__main__":
    main()
