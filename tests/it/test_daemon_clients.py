"""Hostile and careless clients cost only their own connection.

Invented scenario: a weather app tests a radar map ("radar") against the
control. While one well-behaved client streams records over TCP:
  - a client sending garbage lines is cut off ("garbage");
  - a client sending a 1 MB line is cut off ("line_flood") once the line
    runs past client_buffer (64 KiB here);
  - a client with one over-long line among good ones loses that line only
    (counted as too_long) and stays connected;
  - a last line without a newline counts when the client closes;
  - connections beyond max_clients are closed at once and counted;
  - when descriptors run out (RLIMIT_NOFILE), accepting pauses and
    resumes by itself;
and every record of the good client is applied.
"""
import resource
import socket
import threading
import time

from _lib import Tap, Daemon, wait_for

EXP = "radar_map"


def good_lines(n, arm_of=lambda i: "control" if i % 2 == 0 else "radar"):
    return ["expose %s %s" % (EXP, arm_of(i)) for i in range(n)]


def closed_by_peer(s, timeout=10):
    """True when the daemon closed the connection (EOF or reset)."""
    s.settimeout(timeout)
    try:
        while True:
            if not s.recv(65536):
                return True
    except (ConnectionResetError, BrokenPipeError):
        return True
    except socket.timeout:
        return False


def main():
    tap = Tap()
    with Daemon("clients", udp=False,
                daemon_keys={"client_buffer": "65536",
                             "max_clients": "4"}) as d:
        d.send_tcp(["plan %s control=50 radar=50" % EXP])

        # The good client streams in the background all along.
        good = good_lines(4000)
        result = {}

        def stream_good():
            s = d.connect_tcp()
            try:
                for i in range(0, len(good), 100):
                    s.sendall(("\n".join(good[i:i + 100]) + "\n").encode())
                    time.sleep(0.005)
                s.shutdown(socket.SHUT_WR)
                result["closed"] = closed_by_peer(s)
            except OSError as e:
                result["error"] = repr(e)
            finally:
                s.close()
        th = threading.Thread(target=stream_good)
        th.start()

        # Garbage: cut off.
        g = d.connect_tcp()
        try:
            g.sendall(b"this is not a record at all\n" * 500)
        except OSError:
            pass
        tap.ok(closed_by_peer(g), "garbage client: connection closed by "
               "the daemon")
        g.close()

        # A 1 MB line over the Unix socket: cut off.
        u = d.connect_unix()
        sent = 0
        try:
            chunk = b"x" * 65536
            for _ in range(16):
                u.sendall(chunk)
                sent += len(chunk)
            u.sendall(b"\n")
        except OSError:
            pass
        tap.ok(closed_by_peer(u), "1 MB line: connection closed by the "
               "daemon (sent %d bytes before it did)" % sent)
        u.close()

        # One over-long line among good ones: only that line is lost; a
        # final line without newline counts at close.
        mixed = ["expose %s radar" % EXP, "expose %s" % EXP,
                 "observe " + "z" * 5000] + good_lines(10)
        d.send_tcp("\n".join(mixed[:3]) + "\n" + "\n".join(mixed[3:]))

        th.join(30)
        tap.ok(result.get("closed") and "error" not in result,
               "good client streamed to the end meanwhile", result)

        # Connection cap: 4 held open, the 5th is closed at once.
        held = [d.connect_tcp() for _ in range(4)]
        time.sleep(0.2)
        extra = d.connect_tcp()
        tap.ok(closed_by_peer(extra, 5), "5th connection over max_clients=4 "
               "closed at once")
        extra.close()
        for s in held:
            s.close()

        # Once the held ones are gone, a new client gets in again.
        time.sleep(0.3)
        d.send_tcp(["expose %s control" % EXP])

        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "tcp") ==
                               1 + len(good) + 1 + 10 + 1, 15)
        tap.ok(ck is not None, "every good record applied (plan, stream, "
               "mixed, after the cap)")
        ck = ck or d.read_checkpoint()
        lc = ck["counters"]["listen"]
        tap.eq(lc["cut"]["tcp"], {"garbage": 1, "line_flood": 0},
               "tcp cut-offs by reason")
        tap.eq(lc["cut"]["unix"], {"garbage": 0, "line_flood": 1},
               "unix cut-offs by reason")
        tap.eq(lc["refused"], 1, "one connection refused at the cap")
        rej = ck["counters"]["ingest"]["rejected"]
        tap.ok(rej["tcp"].get("too_long") == 1, "tcp: one too_long line",
               rej["tcp"])
        tap.ok(rej["tcp"].get("bad_fields") == 1, "tcp: one bad_fields line "
               "(the mixed client's)", rej["tcp"])
        tap.ok(100 < rej["tcp"].get("bad_kind", 0) <= 500,
               "tcp: garbage lines counted until the cut (%d)"
               % rej["tcp"].get("bad_kind", 0))
        tap.eq(rej["unix"], {"too_long": 1}, "unix: the 1 MB line counted "
               "once as too_long")
        tap.ok(d.alive(), "the daemon is still running")
        tap.ok("client cut off: garbage" in d.log_text() and
               "client cut off: line_flood" in d.log_text(),
               "cut-offs logged with their reason")
        tap.ok(d.stop() == 0, "clean exit")
    emfile(tap)
    tap.done()


def emfile(tap):
    """Out of descriptors: accepting pauses, then resumes by itself."""
    def low_nofile():
        resource.setrlimit(resource.RLIMIT_NOFILE, (40, 40))
    with Daemon("emfile", udp=False, unix=False, preexec_fn=low_nofile,
                daemon_keys={"max_clients": "1000",
                             "checkpoint_every": "1h"}) as d:
        d.send_tcp(["plan %s control=50 radar=50" % EXP])
        held = []
        try:
            for _ in range(60):
                held.append(d.connect_tcp())
        except OSError:
            pass
        paused = wait_for(lambda: "pausing accept" in d.log_text(), 5)
        tap.ok(paused, "accept pauses when descriptors run out (%d "
               "connections open)" % len(held))
        for s in held:
            s.close()
        time.sleep(0.2)
        d.send_tcp(["expose %s radar" % EXP])
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "tcp") == 2, 10)
        tap.ok(ck is not None and ck["counters"]["listen"]
               ["accept_backoffs"] >= 1, "accepting resumed; backoffs "
               "counted", ck and ck["counters"]["listen"])
        tap.ok(d.stop() == 0, "clean exit")


if __name__ == "__main__":
    main()
