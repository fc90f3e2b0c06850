"""stopcockd as a service: configuration check, reload, signals, systemd
notifications, checkpoints refused when damaged, the Unix socket's stale
path, and the systemd unit.

Invented scenario: a library app tests a new hold queue ("express") with
guardrails on hold failures and, after a reload, on late returns.
"""
import os
import shutil
import signal
import subprocess
import tempfile
import time

from _lib import Tap, Daemon, DaemonExited, STOPCOCKD, checkpoint_read, \
    checkpoint_write_raw, summary_exposures, wait_for

EXP = "hold_queue"

GUARD_A = """
[guardrail hold_failures]
metric = hold_failed
test = proportion
harm = increase
margin = 0
"""

GUARD_B = GUARD_A + """
[guardrail late_returns]
metric = late_return
test = proportion
harm = increase
margin = 0
"""


def run(args, **kw):
    return subprocess.run([STOPCOCKD] + args, capture_output=True, text=True,
                          timeout=20, **kw)


def config_checks(tap):
    d = Daemon("cfg", guardrails=GUARD_A, start=False)
    with d:
        p = run(["-t", "-c", d.conf_path])
        tap.ok(p.returncode == 0 and "configuration OK" in p.stdout,
               "-t on a good file: configuration OK", p.stdout + p.stderr)
        d.write_conf(d.conf_text.replace("tick = 200ms", "tick = soon"))
        p = run(["-t", "-c", d.conf_path])
        tap.ok(p.returncode == 78 and "stopcock.conf:" in p.stderr,
               "-t on a bad file: exit 78 with file:line errors",
               "%d %s" % (p.returncode, p.stderr))
        d.write_conf("[defaults]\nalpha = 0.05\n[daemon]\nstate = %s\n"
                     % d.state)
        p = run(["-t", "-c", d.conf_path])
        tap.ok(p.returncode == 78 and "no input" in p.stderr,
               "-t: no listener and no Redis is an error", p.stderr)
        p = run(["-d", "-c", d.conf_path])
        tap.ok(p.returncode == 78 and "no input" in p.stderr,
               "and the daemon refuses to start", p.stderr)
        p = run(["-h"])
        tap.ok(p.returncode == 0 and "client_buffer" in p.stdout,
               "-h lists the configuration keys")


def reload_and_notify(tap):
    with Daemon("reload", guardrails=GUARD_A,
                env={"WATCHDOG_USEC": "200000"}) as d:
        started = time.time()
        d.send_tcp(["plan %s control=50 express=50" % EXP,
                    "expose %s control" % EXP])
        tap.ok(d.wait_notice("WATCHDOG=1", 3), "WATCHDOG=1 pings with "
               "WATCHDOG_USEC set")

        # A bad file: the running configuration stays.
        good_text = d.conf_text
        d.write_conf(good_text + "\n[guardrail broken]\nmetric = x\n")
        d.signal(signal.SIGHUP)
        kept = wait_for(lambda: "keeping the running configuration" in
                        d.log_text(), 5)
        tap.ok(kept, "SIGHUP with a bad file: keeps running and says why")
        tap.ok("[guardrail broken] is missing required key" in
               d.log_text().split("reload: reading")[-1],
               "the reason names the bad section")
        tap.ok(d.alive(), "still alive after the bad reload")
        tap.ok(d.wait_notice("RELOADING=1", 1) and
               d.notices.count("READY=1") >= 2,
               "RELOADING=1 then READY=1 around the reload", d.notices)
        d.send_tcp(["expose %s express" % EXP])

        # A good file with one more guardrail takes effect.
        d.write_conf(good_text.replace(GUARD_A, GUARD_B))
        d.signal(signal.SIGHUP)
        tap.ok(wait_for(lambda: "reload: configuration in force" in
                        d.log_text(), 5), "SIGHUP with a good file: "
               "configuration in force")
        d.send_tcp(["count %s control late_return 1 10" % EXP,
                    "count %s express late_return 2 10" % EXP])
        ck = d.wait_checkpoint(lambda c: Daemon.records(c) == 5, 10)
        names = {g["name"] for e in (ck or {}).get("summary", {}).get(
            "experiments", []) for g in e["guardrails"]}
        tap.ok("late_returns" in names, "the new guardrail is live", names)

        # STATUS= carries the ingest rate (every 5 s).
        wait = max(0.0, 6.5 - (time.time() - started))
        tap.ok(d.wait_notice("STATUS=", 0) and
               wait_for(lambda: any("records/s" in n for n in
                                    d.read_notices()), wait + 1),
               "STATUS= with the ingest rate",
               [n for n in d.notices if n.startswith("STATUS")])

        # The checkpoint file, checked on our own (hashlib).
        tap.ok(d.stop() == 0 and "STOPPING=1" in d.notices,
               "SIGTERM: STOPPING=1 and exit 0")
        raw = open(d.checkpoint_path, "rb").read()
        ck = checkpoint_read(d.checkpoint_path)
        tap.ok(ck["format"] == "stopcock-checkpoint" and ck["version"] == 1
               and "engine" in ck and "alerts" in ck and
               "redis_last_id" in ck, "checkpoint: header, length and "
               "SHA-256 verified independently; pinned keys present")
        mode = os.stat(d.checkpoint_path).st_mode & 0o777
        tap.ok(mode & 0o007 == 0, "checkpoint not world-readable (%o)" % mode)
        tap.ok(not os.path.exists(d.checkpoint_path + ".tmp"),
               "no temporary file left behind")

        # Restart: state and counters come back.
        d.start()
        d.send_tcp(["expose %s express" % EXP])
        ck2 = d.wait_checkpoint(lambda c: Daemon.records(c) == 6, 10)
        tap.ok(ck2 is not None and summary_exposures(ck2) ==
               {(EXP, "control"): 1, (EXP, "express"): 2},
               "restart resumes tallies and counters from the checkpoint",
               ck2 and ck2["summary"])
        tap.ok(d.stop() == 0, "clean exit after the restart")
        return raw


def corrupt_checkpoints(tap, raw):
    header, payload = raw.split(b"\n", 1)
    flipped = bytearray(payload)
    flipped[len(flipped) // 2] ^= 0x20
    cases = [
        ("checksum mismatch", header + b"\n" + bytes(flipped)),
        ("length mismatch", raw[:-10]),
        ("bad magic", b"NOTSTOPCOCK 1 2 x\n{}"),
        ("unsupported checkpoint version", raw.replace(
            b"STOPCOCK-CKPT 1 ", b"STOPCOCK-CKPT 2 ", 1)),
    ]
    d = Daemon("corrupt", guardrails=GUARD_B, start=False)
    with d:
        os.makedirs(d.state, exist_ok=True)
        for why, data in cases:
            with open(d.checkpoint_path, "wb") as f:
                f.write(data)
            try:
                d.start()
                code = "started"
            except DaemonExited:
                code = d.proc.returncode
            log = d.log_text().split("=== start")[-1]
            tap.ok(code == 65 and why in log, "refused: %s (exit %s)"
                   % (why, code), log[-300:])
            tap.ok(open(d.checkpoint_path, "rb").read() == data,
                   "the refused file is left untouched")
        # A good frame around state the engine refuses.
        checkpoint_write_raw(d.checkpoint_path, b'{"format": "stopcock-'
                             b'checkpoint", "version": 1, "engine": '
                             b'{"format": "something-else"}}')
        try:
            d.start()
            code = "started"
        except DaemonExited:
            code = d.proc.returncode
        log = d.log_text().split("=== start")[-1]
        tap.ok(code == 65 and "engine state refused" in log,
               "refused: engine state (exit %s)" % code, log[-300:])
        # Moved away: a fresh start.
        os.rename(d.checkpoint_path, d.checkpoint_path + ".bad")
        d.start()
        tap.ok("no checkpoint: fresh start" in d.log_text(),
               "with the file moved away, a fresh start")
        d.stop()


def unix_socket(tap):
    a = Daemon("unix-a", tcp=False, udp=False)
    with a:
        b = Daemon("unix-b", tcp=False, udp=False, start=False)
        b.write_conf(b.conf_text.replace(b.unix, a.unix))
        with b:
            try:
                b.start()
                code = "started"
            except DaemonExited:
                code = b.proc.returncode
            tap.ok(code != "started" and "in use by another process" in
                   b.log_text(), "a live socket path is not taken over")
        mode = os.stat(a.unix).st_mode & 0o777
        tap.eq(mode, 0o660, "socket mode 0660")
        a.kill9()
        tap.ok(os.path.exists(a.unix), "kill -9 leaves a stale socket")
        a.start()
        a.send_unix(["plan %s control=50 express=50" % EXP])
        tap.ok("removed stale socket" in a.log_text(),
               "the stale socket is replaced on start")
        a.stop()
        tap.ok(not os.path.exists(a.unix), "socket removed at exit")


def systemd_unit(tap):
    unit = os.path.join(os.path.dirname(__file__), "..", "..", "systemd",
                        "stopcockd.service")
    text = open(unit).read()
    for key in ("Type=notify", "WatchdogSec=", "User=stopcock",
                "ProtectSystem=strict", "StateDirectory=stopcock",
                "RuntimeDirectory=stopcock", "NoNewPrivileges=yes",
                "PrivateTmp=yes", "RestrictAddressFamilies=AF_INET AF_INET6 "
                "AF_UNIX", "ExecReload=/bin/kill -HUP $MAINPID",
                "Restart=on-failure", "CapabilityBoundingSet=\n"):
        tap.ok(key in text, "unit has " + key.strip())
    tool = shutil.which("systemd-analyze")
    if tool is None:
        tap.ok(False, "systemd-analyze not installed")
        return
    tmp = tempfile.mkdtemp(prefix="stopcock-unit-")
    try:
        sbindir = os.path.abspath(os.path.dirname(STOPCOCKD))
        path = os.path.join(tmp, "stopcockd.service")
        with open(path, "w") as f:
            f.write(text.replace("@SBINDIR@", sbindir))
        p = subprocess.run([tool, "verify", path], capture_output=True,
                           text=True, timeout=60)
        tap.ok(p.returncode == 0, "systemd-analyze verify passes",
               p.stdout + p.stderr)
        # The check can fail: a missing binary is reported.
        with open(path, "w") as f:
            f.write(text.replace("@SBINDIR@", os.path.join(tmp, "nowhere")))
        p = subprocess.run([tool, "verify", path], capture_output=True,
                           text=True, timeout=60)
        tap.ok(p.returncode != 0, "and fails for a missing binary")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def main():
    tap = Tap()
    config_checks(tap)
    raw = reload_and_notify(tap)
    corrupt_checkpoints(tap, raw)
    unix_socket(tap)
    systemd_unit(tap)
    tap.done()


if __name__ == "__main__":
    main()
