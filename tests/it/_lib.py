"""Shared helpers for stopcock's integration tests (not a test: leading "_").

Everything here starts real programs on private loopback ports in temporary
directories and stops them again; nothing touches a non-loopback address.

    from _lib import Tap, Redis, Daemon, checkpoint_read

    tap = Tap()
    with Redis("mytest") as redis, \
         Daemon("mytest", redis=redis, guardrails=GUARDRAILS) as d:
        d.send_tcp(["plan exp a=50 b=50", "expose exp a"])
        redis.xadd(d.stream, {"records": "expose exp b\\nexpose exp b"})
        ck = d.wait_checkpoint(lambda c: d.records(c) == 3, timeout=10)
        tap.ok(ck is not None, "three records applied")
    tap.done()

Pieces:
  Tap            TAP printer ("ok N name" / "not ok N name"); done() exits.
  free_port()    a loopback port free for both TCP and UDP right now.
  Redis          redis-server on a free port in its own directory
                 (--save '' --appendonly no unless appendonly=True), a tiny
                 RESP client (cmd, xadd, xlen, xrange, xpending), stop(),
                 start() again on the same port and directory.
  Daemon         stopcockd with a generated configuration (or your own
                 text), readiness through systemd's NOTIFY_SOCKET (READY=1
                 is awaited; a thread drains the socket as systemd does,
                 every notification is kept in .notices; hold_notify()
                 stops the draining), send
                 lines over TCP, UDP and the Unix socket, checkpoint() to
                 request one (SIGUSR1) and read it, wait_checkpoint(pred),
                 stop() (SIGTERM, returns the exit code), kill9(), start()
                 again with the same state directory.
  checkpoint_read(path)  parse a checkpoint file, checking its header,
                 length and SHA-256 independently of the daemon (hashlib).
  replay(conf, lines)    run `stopcock replay` and return its findings and
                 summary, for comparing the daemon with the offline engine.
  exposures(lines)       count expose records per (experiment, variant)
                 straight from the text, as an outside check.
  metrics(d)     the daemon's /metrics as {"name{labels}": value}.

Environment: STOPCOCK_BUILD (directory holding stopcockd and stopcock,
default "build") and STOPCOCK_TEST_OUT (logs; default BUILD/test-output).
Daemon logs go to OUT/<name>-stopcockd.log, Redis logs to OUT/<name>-redis.log.
"""
import hashlib
import http.client
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time

BUILD = os.environ.get("STOPCOCK_BUILD", "build")
OUT = os.path.abspath(os.environ.get("STOPCOCK_TEST_OUT",
                                   os.path.join(BUILD, "test-output")))
STOPCOCKD = os.path.join(BUILD, "stopcockd")
STOPCOCK = os.path.join(BUILD, "stopcock")
REDIS_SERVER = shutil.which("redis-server") or "/usr/bin/redis-server"

os.makedirs(OUT, exist_ok=True)


class Tap:
    """Minimal TAP printer; done() prints the plan and exits 1 on failure."""

    def __init__(self):
        self.n = 0
        self.failed = 0

    def ok(self, cond, name, detail=None):
        self.n += 1
        cond = bool(cond)
        print("%s %d %s" % ("ok" if cond else "not ok", self.n, name))
        if not cond:
            self.failed += 1
            if detail is not None:
                for line in str(detail).splitlines()[:30]:
                    print("# " + line)
        sys.stdout.flush()
        return cond

    def eq(self, got, want, name):
        return self.ok(got == want, name, "got:  %r\nwant: %r" % (got, want))

    def diag(self, text):
        for line in str(text).splitlines():
            print("# " + line)
        sys.stdout.flush()

    def done(self):
        print("1..%d" % self.n)
        sys.stdout.flush()
        sys.exit(1 if self.failed else 0)


def free_port():
    """A loopback port that is free for TCP and UDP at this moment."""
    for _ in range(100):
        t = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        t.bind(("127.0.0.1", 0))
        port = t.getsockname()[1]
        u = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            u.bind(("127.0.0.1", port))
        except OSError:
            continue
        finally:
            u.close()
            t.close()
        return port
    raise RuntimeError("no free port")


def wait_for(pred, timeout, step=0.05):
    """Poll pred() until it returns a true value (returned) or time is up
    (None)."""
    deadline = time.time() + timeout
    while True:
        v = pred()
        if v:
            return v
        if time.time() >= deadline:
            return None
        time.sleep(step)


# --- Redis -----------------------------------------------------------------

class RespError(Exception):
    pass


class _Resp:
    """Just enough RESP2 for tests: encode a command, decode one reply."""

    def __init__(self, port, timeout=10):
        self.sock = socket.create_connection(("127.0.0.1", port), timeout)
        self.buf = b""

    def close(self):
        self.sock.close()

    def _line(self):
        while b"\r\n" not in self.buf:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise ConnectionError("redis closed the connection")
            self.buf += chunk
        line, self.buf = self.buf.split(b"\r\n", 1)
        return line

    def _exact(self, n):
        while len(self.buf) < n + 2:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise ConnectionError("redis closed the connection")
            self.buf += chunk
        data, self.buf = self.buf[:n], self.buf[n + 2:]
        return data

    def reply(self):
        line = self._line()
        kind, rest = line[:1], line[1:]
        if kind == b"+":
            return rest.decode()
        if kind == b"-":
            return RespError(rest.decode())
        if kind == b":":
            return int(rest)
        if kind == b"$":
            n = int(rest)
            return None if n < 0 else self._exact(n).decode("utf-8",
                                                             "replace")
        if kind == b"*":
            n = int(rest)
            return None if n < 0 else [self.reply() for _ in range(n)]
        raise RuntimeError("bad RESP reply %r" % line)

    def command(self, *args):
        out = [b"*%d\r\n" % len(args)]
        for a in args:
            if not isinstance(a, bytes):
                a = str(a).encode()
            out.append(b"$%d\r\n%s\r\n" % (len(a), a))
        self.sock.sendall(b"".join(out))
        r = self.reply()
        if isinstance(r, RespError):
            raise r
        return r


class Redis:
    """A private redis-server. appendonly=True keeps data across stop() and
    start() (same port and directory), for restart tests."""

    def __init__(self, name, appendonly=False):
        self.name = name
        self.appendonly = appendonly
        self.dir = tempfile.mkdtemp(prefix="stopcock-redis-%s-" % name)
        self.port = free_port()
        self.proc = None
        self.conn = None
        self.logpath = os.path.join(OUT, "%s-redis.log" % name)
        self.start()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()
        shutil.rmtree(self.dir, ignore_errors=True)

    def start(self, timeout=10):
        args = [REDIS_SERVER, "--port", str(self.port),
                "--bind", "127.0.0.1", "--dir", self.dir,
                "--save", "", "--daemonize", "no",
                "--logfile", self.logpath,
                "--appendonly", "yes" if self.appendonly else "no"]
        if self.appendonly:
            args += ["--appendfsync", "always"]
        self.proc = subprocess.Popen(args, stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)

        def up():
            if self.proc.poll() is not None:
                raise RuntimeError("redis-server exited; see " + self.logpath)
            try:
                c = _Resp(self.port, timeout=1)
                ok = c.command("PING") == "PONG"
                c.close()
                return ok
            except OSError:
                return False
            except RespError:	# LOADING while it reads its AOF
                return False
        if not wait_for(up, timeout):
            raise RuntimeError("redis-server did not start")
        self.conn = _Resp(self.port)

    def stop(self):
        """Graceful stop (SIGTERM: the AOF is flushed); idempotent."""
        if self.conn is not None:
            self.conn.close()
            self.conn = None
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def cmd(self, *args):
        if self.conn is None:
            self.conn = _Resp(self.port)
        return self.conn.command(*args)

    def xadd(self, stream, fields):
        """fields: a dict or a list of (field, value) pairs; returns the ID."""
        items = fields.items() if isinstance(fields, dict) else fields
        flat = []
        for k, v in items:
            flat += [k, v]
        return self.cmd("XADD", stream, "*", *flat)

    def xlen(self, stream):
        return self.cmd("XLEN", stream)

    def xrange(self, stream, start="-", end="+"):
        """[(id, {field: value}), ...]; repeated fields keep the last."""
        out = []
        for eid, flat in self.cmd("XRANGE", stream, start, end):
            out.append((eid, dict(zip(flat[0::2], flat[1::2]))))
        return out

    def xpending(self, stream, group):
        """Summary: (count, {consumer: count})."""
        r = self.cmd("XPENDING", stream, group)
        per = {c: int(n) for c, n in (r[3] or [])}
        return r[0], per


# --- checkpoints -----------------------------------------------------------

HEADER_RE = re.compile(rb"^STOPCOCK-CKPT (\d+) (\d+) ([0-9a-f]{64})\n")


class CheckpointError(Exception):
    pass


def checkpoint_read(path):
    """Parse and verify a checkpoint file on our own (hashlib, json): the
    header line, the payload length and its SHA-256. Returns the JSON."""
    with open(path, "rb") as f:
        data = f.read()
    m = HEADER_RE.match(data)
    if not m:
        raise CheckpointError("bad header: %r" % data[:80])
    payload = data[m.end():]
    if int(m.group(1)) != 1:
        raise CheckpointError("version %s" % m.group(1))
    if int(m.group(2)) != len(payload):
        raise CheckpointError("length %s != %d" % (m.group(2), len(payload)))
    if hashlib.sha256(payload).hexdigest() != m.group(3).decode():
        raise CheckpointError("sha256 mismatch")
    return json.loads(payload)


def checkpoint_write_raw(path, payload_bytes, version=1, length=None,
                         digest=None):
    """Write a checkpoint frame by hand (to build corrupt ones)."""
    if length is None:
        length = len(payload_bytes)
    if digest is None:
        digest = hashlib.sha256(payload_bytes).hexdigest()
    with open(path, "wb") as f:
        f.write(b"STOPCOCK-CKPT %d %d %s\n" % (version, length,
                                                digest.encode()))
        f.write(payload_bytes)


def summary_exposures(ck):
    """{(experiment, variant): exposures} from a checkpoint's summary."""
    out = {}
    for e in ck["summary"]["experiments"]:
        for a in e["arms"]:
            out[(e["id"], a["variant"])] = a["exposures"]
    return out


def summary_verdicts(ck):
    """{(experiment, guardrail, variant): verdict} from the summary."""
    out = {}
    for e in ck["summary"]["experiments"]:
        for g in e["guardrails"]:
            out[(e["id"], g["name"], g["variant"])] = g["verdict"]
    return out


# --- the daemon ------------------------------------------------------------

class DaemonExited(Exception):
    pass


class Daemon:
    """stopcockd on private ports with its own state directory.

    Inputs are on by default (tcp, udp, unix; redis when a Redis is given);
    pass tcp=False etc. to leave one out. conf=TEXT replaces the generated
    configuration entirely (then no listener is implied). Extra sections
    go in `guardrails` / `extra`; extra [daemon] or [redis] keys in
    daemon_keys / redis_keys (dicts). The daemon runs with -d (debug log to
    OUT/<name>-stopcockd.log). start=False builds the config only.
    """

    def __init__(self, name, redis=None, guardrails="", extra="",
                 tcp=True, udp=True, unix=True, http=False,
                 daemon_keys=None, redis_keys=None, conf=None, start=True,
                 env=None, args=("-d",), preexec_fn=None, wrap=()):
        self.name = name
        self.dir = tempfile.mkdtemp(prefix="stopcock-%s-" % name)
        self.state = os.path.join(self.dir, "state")
        self.conf_path = os.path.join(self.dir, "stopcock.conf")
        self.tcp = free_port() if tcp else None
        self.udp = (self.tcp if self.tcp else free_port()) if udp else None
        self.unix = os.path.join(self.dir, "events.sock") if unix else None
        self.http = free_port() if http else None
        self.redis = redis
        self.stream = "stopcock:%s" % name
        self.group = "stopcock"
        self.consumer = "it-%s" % name
        self.dead = "stopcock:%s:dead" % name
        self.env = env or {}
        self.preexec_fn = preexec_fn	# e.g. to set resource limits
        # A command the daemon runs under (it must exec it in the same
        # process, so the pid stays the daemon's): e.g. unshare -m ...
        self.wrap = list(wrap)
        self.args = list(args)
        self.proc = None
        self.notices = []
        self.notify = None
        self.notify_held = False
        self._notify_lock = threading.Lock()
        self.logpath = os.path.join(OUT, "%s-stopcockd.log" % name)
        self.log = None
        if conf is None:
            conf = self._conf(guardrails, extra, daemon_keys or {},
                              redis_keys or {})
        self.write_conf(conf)
        if start:
            self.start()

    def _conf(self, guardrails, extra, daemon_keys, redis_keys):
        d = {"state": self.state, "tick": "200ms",
             "checkpoint_every": "200ms"}
        if self.tcp:
            d["tcp"] = "127.0.0.1:%d" % self.tcp
        if self.udp:
            d["udp"] = "127.0.0.1:%d" % self.udp
        if self.unix:
            d["unix"] = self.unix
        if self.http:
            d["http"] = "127.0.0.1:%d" % self.http
        d.update(daemon_keys)
        # The tests send a burst of records within a second, stamped on
        # arrival and so in order: no lateness, and SRM intervals of 1 ms,
        # or the SRM test would wait for record time to pass.
        text = ("[defaults]\nalpha = 0.05\nplan_units = 2000\n"
                "lateness = 0\nsrm_interval = 1ms\n\n")
        text += guardrails + "\n"
        text += "[daemon]\n" + "".join("%s = %s\n" % kv for kv in d.items())
        if self.redis is not None:
            r = {"address": "127.0.0.1:%d" % self.redis.port,
                 "stream": self.stream, "group": self.group,
                 "consumer": self.consumer, "dead_letter": self.dead,
                 "block": "200ms", "claim_idle": "1s"}
            r.update(redis_keys)
            text += "\n[redis]\n" + "".join("%s = %s\n" % kv
                                            for kv in r.items())
        return text + "\n" + extra

    def write_conf(self, text):
        self.conf_text = text
        with open(self.conf_path, "w") as f:
            f.write(text)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # process control

    def start(self, wait=True, timeout=15):
        """Start stopcockd; with wait, return once it sent READY=1."""
        self.notify_path = os.path.join(self.dir, "notify.sock")
        if os.path.exists(self.notify_path):
            os.unlink(self.notify_path)
        self.notify = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.notify.bind(self.notify_path)
        self.notify.setblocking(False)
        self.notices = []
        # systemd reads its notify socket all the time; so does this
        # thread (a full queue would cost the daemon its notifications),
        # unless a test holds it to play a reader that never reads.
        self._drain_stop = threading.Event()
        self._drainer = threading.Thread(target=self._drain, daemon=True)
        self._drainer.start()
        env = dict(os.environ)
        env["NOTIFY_SOCKET"] = self.notify_path
        env.update(self.env)
        # A fresh log per Daemon object; restarts append to it.
        self.log = open(self.logpath, "a" if self.proc else "w")
        self.log.write("=== start %s\n" % time.strftime("%H:%M:%S"))
        self.log.flush()
        self.proc = subprocess.Popen(
            self.wrap + [STOPCOCKD] + self.args + ["-c", self.conf_path],
            stdin=subprocess.DEVNULL, stdout=self.log, stderr=self.log,
            env=env, preexec_fn=self.preexec_fn)
        if wait and not self.wait_notice("READY=1", timeout):
            code = self.proc.poll()
            self.kill9()
            raise DaemonExited("stopcockd not ready (exit %r); see %s"
                               % (code, self.logpath))
        if wait and self.redis is not None and self.redis.proc is not None:
            # The group is created at the stream's end ("$"): entries added
            # before it exists are not for us. Wait for it.
            if not self.wait_group(timeout):
                raise DaemonExited("consumer group not created; see %s"
                                   % self.logpath)
        return self

    def wait_group(self, timeout=10):
        """Wait until the daemon's consumer group exists in Redis."""
        def exists():
            try:
                groups = self.redis.cmd("XINFO", "GROUPS", self.stream)
            except Exception:	# no such key yet
                return False
            return any(dict(zip(g[0::2], g[1::2])).get("name") == self.group
                       for g in groups)
        return wait_for(exists, timeout)

    def read_notices(self):
        """Collect pending sd_notify datagrams into self.notices."""
        with self._notify_lock:
            while self.notify is not None:
                try:
                    data = self.notify.recv(4096)
                except (BlockingIOError, InterruptedError):
                    break
                self.notices += data.decode().split("\n")
        return self.notices

    def hold_notify(self, hold=True):
        """Stop (or resume) draining the notify socket in the background,
        to test a reader that never reads."""
        self.notify_held = hold

    def _drain(self):
        while not self._drain_stop.wait(0.05):
            if not self.notify_held:
                self.read_notices()

    def wait_notice(self, prefix, timeout=10):
        """Wait for a notification starting with prefix; the line or None."""
        def seen():
            for n in self.read_notices():
                if n.startswith(prefix):
                    return n
            if self.proc.poll() is not None:
                self.read_notices()
                return next((n for n in self.notices
                             if n.startswith(prefix)), None) or "EXITED"
            return None
        r = wait_for(seen, timeout, 0.02)
        return None if r in (None, "EXITED") else r

    def alive(self):
        return self.proc is not None and self.proc.poll() is None

    def signal(self, sig):
        self.proc.send_signal(sig)

    def stop(self, timeout=20):
        """SIGTERM and wait; returns the exit code."""
        if self.proc is None:
            return None
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.read_notices()
        code = self.proc.returncode
        self._closed()
        return code

    def kill9(self):
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        self._closed()

    def wait_exit(self, timeout=15):
        """Wait for the process to end by itself; its exit code."""
        try:
            return self.proc.wait(timeout=timeout)
        finally:
            self._closed()

    def _closed(self):
        if self.notify is not None:
            self._drain_stop.set()
            self._drainer.join()
            self.read_notices()
            self.notify.close()
            self.notify = None
        if self.log is not None:
            self.log.close()
            self.log = None

    def close(self):
        self.kill9()
        shutil.rmtree(self.dir, ignore_errors=True)

    def log_text(self):
        with open(self.logpath, errors="replace") as f:
            return f.read()

    # inputs

    @staticmethod
    def _bytes(lines):
        if isinstance(lines, (bytes, bytearray)):
            return bytes(lines)
        if isinstance(lines, str):
            return lines.encode()
        return "".join(l + "\n" for l in lines).encode()

    def connect_tcp(self):
        return socket.create_connection(("127.0.0.1", self.tcp), 10)

    def connect_unix(self):
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.settimeout(10)
        s.connect(self.unix)
        return s

    def _send_stream(self, s, lines):
        try:
            s.sendall(self._bytes(lines))
            s.shutdown(socket.SHUT_WR)
            # Wait for the daemon to close its side: everything was read.
            s.settimeout(10)
            while s.recv(4096):
                pass
        finally:
            s.close()

    def send_tcp(self, lines):
        """Send lines (list of str, str or bytes) on a new connection and
        wait until the daemon has read them and closed its side."""
        self._send_stream(self.connect_tcp(), lines)

    def send_unix(self, lines):
        self._send_stream(self.connect_unix(), lines)

    def send_udp(self, lines, per_datagram=50):
        """Send lines as datagrams of per_datagram lines each."""
        if isinstance(lines, (str, bytes)):
            lines = self._bytes(lines).decode().splitlines()
        s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            for i in range(0, len(lines), per_datagram):
                s.sendto(self._bytes(lines[i:i + per_datagram]),
                         ("127.0.0.1", self.udp))
        finally:
            s.close()

    # state

    @property
    def checkpoint_path(self):
        return os.path.join(self.state, "checkpoint")

    def read_checkpoint(self):
        """The current checkpoint file, verified, or None if absent."""
        try:
            return checkpoint_read(self.checkpoint_path)
        except FileNotFoundError:
            return None

    def checkpoint(self, timeout=10):
        """Ask for a checkpoint now (SIGUSR1) and return it once written."""
        before = self.read_checkpoint()
        n0 = before["counters"]["checkpoints"] if before else 0
        self.signal(signal.SIGUSR1)

        def newer():
            try:
                ck = self.read_checkpoint()
            except (CheckpointError, ValueError):
                return None	# caught mid-rename: not possible, but cheap
            return ck if ck and ck["counters"]["checkpoints"] > n0 else None
        return wait_for(newer, timeout)

    def wait_checkpoint(self, pred, timeout=20):
        """Request checkpoints until pred(checkpoint) holds; the checkpoint
        or None. The daemon must be running."""
        def check():
            if not self.alive():
                raise DaemonExited("stopcockd exited; see " + self.logpath)
            ck = self.checkpoint(timeout=5)
            return ck if ck is not None and pred(ck) else None
        return wait_for(check, timeout, 0.1)

    @staticmethod
    def records(ck, source=None):
        """Records applied, in total or for one source, per a checkpoint."""
        r = ck["counters"]["ingest"]["records"]
        return r[source] if source else sum(r.values())

    @staticmethod
    def rejected(ck, source):
        return ck["counters"]["ingest"]["rejected"][source]


def metrics(d):
    """{"name" or "name{labels}" (as written): value} from d's /metrics;
    the full Prometheus parser is tested in test_metrics.py."""
    c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
    try:
        c.request("GET", "/metrics")
        text = c.getresponse().read().decode()
    finally:
        c.close()
    out = {}
    for line in text.splitlines():
        if line and not line.startswith("#"):
            name, _, value = line.rpartition(" ")
            out[name] = float(value)
    return out


# --- outside references ----------------------------------------------------

def exposures(lines):
    """Count expose records per (experiment, variant) from plain lines."""
    out = {}
    for line in lines:
        f = line.split()
        if f and f[0].startswith("@"):
            f = f[1:]
        if len(f) >= 3 and f[0] == "expose":
            n = int(f[3]) if len(f) > 3 else 1
            out[(f[1], f[2])] = out.get((f[1], f[2]), 0) + n
    return out


def replay(conf_path, lines):
    """Run `stopcock replay -q -c conf_path` over lines. Returns (findings,
    summary) where findings is the list of JSON lines it printed and
    summary a dict with lines, records, rejected, experiments, verdicts,
    harm and a {reason: count} of rejections."""
    p = subprocess.run([STOPCOCK, "replay", "-q", "-c", conf_path, "-"],
                       input=Daemon._bytes(lines), capture_output=True,
                       timeout=120)
    if p.returncode != 0:
        raise RuntimeError("replay failed: %s" % p.stderr.decode())
    findings = [json.loads(l) for l in p.stdout.decode().splitlines() if l]
    err = p.stderr.decode()
    m = re.search(r"(\d+) lines, (\d+) records applied, (\d+) rejected, "
                  r"(\d+) experiments, (\d+) verdicts \((\d+) harm", err)
    if not m:
        raise RuntimeError("replay summary not understood: %s" % err)
    keys = ("lines", "records", "rejected", "experiments", "verdicts",
            "harm")
    summary = dict(zip(keys, map(int, m.groups())))
    summary["reasons"] = {k: int(v) for k, v in
                          re.findall(r"rejected (\w+): (\d+)", err)}
    return findings, summary


def final_verdicts(findings):
    """{(experiment, guardrail, variant): verdict} of the last finding for
    each test in a replay's output (SRM findings left out)."""
    out = {}
    for f in findings:
        if f.get("kind") == "verdict":
            out[(f["experiment"], f["guardrail"], f["variant"])] = \
                f["verdict"]
    return out
