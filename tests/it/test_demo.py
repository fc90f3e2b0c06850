"""test_demo: `make demo` (tools/demo.py) run as make runs it without a
terminal: it succeeds, leaves no process behind (it used to start its
redis-server twice and stop only the second), and prints no address of
a page it has already shut down.

Processes are found in /proc: a redis-server or stopcockd whose command
line or working directory (redis-server rewrites its command line and
runs in its --dir) names the demo's temporary directories
(stopcock-redis-demo-*, stopcock-demo-*), before and after the run.
"""
import os
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import BUILD, OUT, Tap  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(
    os.path.abspath(__file__))))


def demo_processes():
    found = set()
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            with open("/proc/%s/cmdline" % pid, "rb") as f:
                cmd = f.read().replace(b"\0", b" ").decode("utf-8",
                                                           "replace")
        except OSError:
            continue
        try:
            # redis-server rewrites its command line but runs in its --dir
            cwd = os.readlink("/proc/%s/cwd" % pid)
        except OSError:
            cwd = ""
        where = cmd + " " + cwd
        if ("stopcock-redis-demo-" in where or "stopcock-demo-" in where) \
                and ("redis-server" in cmd or "stopcockd" in cmd):
            found.add((int(pid), where.strip()))
    return found


def main():
    tap = Tap()
    before = demo_processes()
    env = dict(os.environ, STOPCOCK_TEST_OUT=os.path.join(OUT, "demo"))
    p = subprocess.run(["/usr/bin/python3",
                        os.path.join(ROOT, "tools", "demo.py"), BUILD],
                       stdin=subprocess.DEVNULL, capture_output=True,
                       text=True, timeout=300, env=env)
    tap.eq(p.returncode, 0, "the demo succeeds")
    tap.ok("webhook alert received" in p.stdout,
           "it shows the webhook alert", p.stdout[-2000:] + p.stderr[-2000:])
    left = demo_processes() - before
    tap.eq(sorted(left), [], "no redis-server or stopcockd left behind")
    tap.ok("live page:" not in p.stdout and "http://" not in
           p.stdout.splitlines()[-1], "no address of a page already shut "
           "down", p.stdout.splitlines()[-1] if p.stdout else "")
    tap.done()


if __name__ == "__main__":
    main()
