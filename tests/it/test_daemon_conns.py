"""Connection limits that hold: a flood of idle connections cannot lock
anyone else out, idle clients are closed, and so is a slowloris client.

Invented scenario: a bakery chain tests a new loyalty card ("stamps")
against the control. A broken producer host (127.0.0.1) opens 300
connections and never writes.

Daemon 1 (no timeouts, so the flood stays for as long as the test needs;
max_clients = 120, max_clients_per_source = 50):
  - of the 300 connections from 127.0.0.1, 50 are held and 250 refused;
  - records from a second source address (127.0.0.2) and over the Unix
    socket are applied while the flood is held;
  - two more flooding sources fill max_clients with TCP alone; a Unix
    client still gets in, by evicting the longest-idle TCP client.
Daemon 2 (client_idle_timeout = 3s, client_line_timeout = 1s):
  - idle TCP and Unix clients are closed, each counted and logged once;
  - a client trickling one byte every 0.2 s without a newline is cut
    (slow_line), though never idle;
  - a client whose lines each end in time stays connected for longer
    than both timeouts and every record of it is applied.

The expected counts follow from the configured caps and the connections
the test opens (300 - 50 = 250 refused, and so on), not from the daemon.
"""
import socket
import time

from _lib import Tap, Daemon, metrics, wait_for

EXP = "loyalty_stamps"


def closed_by_peer(s, timeout):
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


def connect_from(d, source):
    return socket.create_connection(("127.0.0.1", d.tcp), 10,
                                    source_address=(source, 0))


def send_from(d, source, lines):
    """Send lines on a new connection from source; wait for the close."""
    d._send_stream(connect_from(d, source), lines)


def listen_counters(d):
    ck = d.checkpoint()
    return ck["counters"]["listen"] if ck else None


def flood(tap):
    keys = {"max_clients": "120", "max_clients_per_source": "50",
            "client_idle_timeout": "0", "client_line_timeout": "0"}
    with Daemon("conns-flood", udp=False, http=True,
                daemon_keys=keys) as d:
        d.send_unix(["plan %s control=50 stamps=50" % EXP])
        held = []
        try:
            for _ in range(300):
                held.append(connect_from(d, "127.0.0.1"))
        except OSError as e:
            tap.diag("connecting the flood: %r" % e)
        tap.eq(len(held), 300, "300 connections opened from 127.0.0.1")

        def seen(n):
            def pred():
                lc = listen_counters(d)
                return lc if lc and lc["accepted"]["tcp"] + \
                    lc["refused"] >= n else None
            return pred
        lc = wait_for(seen(300), 30)
        tap.ok(lc is not None, "the daemon saw all 300 connections", lc)
        lc = lc or listen_counters(d)
        tap.eq(lc["clients"]["tcp"], 50, "50 held from 127.0.0.1 "
               "(max_clients_per_source = 50)")
        tap.eq(lc["refused_by"]["max_clients_per_source"], 250,
               "250 refused at the per-source cap")

        # Another source address and the Unix socket get in meanwhile.
        send_from(d, "127.0.0.2", ["expose %s control" % EXP,
                                   "expose %s stamps" % EXP])
        d.send_unix(["expose %s stamps" % EXP])
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "tcp") == 2 and
                               Daemon.records(c, "unix") == 2, 15)
        tap.ok(ck is not None, "records from 127.0.0.2 and the Unix socket "
               "applied while the flood is held")
        # The flood source itself stays refused (closed at once, so the
        # unread line may come back as a reset).
        try:
            send_from(d, "127.0.0.1", ["expose %s control" % EXP])
        except ConnectionResetError:
            pass
        lc = listen_counters(d)
        tap.eq(lc["refused_by"]["max_clients_per_source"], 251,
               "a 301st connection from 127.0.0.1 is refused too")
        tap.eq(lc["clients"]["tcp"], 50, "the flood is still held")

        # Two more flooding sources fill max_clients with TCP alone.
        more = []
        for src in ("127.0.0.3", "127.0.0.4"):
            for _ in range(50):
                more.append(connect_from(d, src))
        lc = wait_for(seen(402), 30)
        tap.ok(lc is not None, "the daemon saw 100 more connections", lc)
        lc = lc or listen_counters(d)
        tap.eq(lc["clients"]["tcp"], 120, "TCP alone holds max_clients "
               "(120)")
        tap.eq(lc["refused_by"]["max_clients"], 30, "30 of 127.0.0.4's "
               "refused at max_clients")
        # The Unix socket is not locked out: it takes the place of the
        # longest-idle TCP client.
        d.send_unix(["expose %s control" % EXP])
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "unix") == 3, 15)
        tap.ok(ck is not None, "a Unix record applied with TCP at "
               "max_clients")
        lc = (ck or d.read_checkpoint())["counters"]["listen"]
        tap.eq(lc["closed"]["tcp"]["evicted"], 1, "one TCP client evicted "
               "for it")
        tap.ok(closed_by_peer(held[0], 10), "the evicted one is the "
               "longest-idle: the first of the flood")
        m = metrics(d)
        tap.eq(m.get('stopcock_clients_refused_total{reason='
                     '"max_clients_per_source"}'), 251,
               "/metrics: refusals at the per-source cap")
        tap.eq(m.get('stopcock_clients_refused_total{reason='
                     '"max_clients"}'), 30, "/metrics: refusals at "
               "max_clients")
        tap.eq(m.get('stopcock_clients_closed_total{source="tcp",'
                     'reason="evicted"}'), 1, "/metrics: the eviction")
        for s in held + more:
            s.close()
        tap.ok(d.stop() == 0, "clean exit")


def timeouts(tap):
    keys = {"client_idle_timeout": "3s", "client_line_timeout": "1s"}
    with Daemon("conns-timeout", udp=False, http=True,
                daemon_keys=keys) as d:
        d.send_unix(["plan %s control=50 stamps=50" % EXP])
        idle = [d.connect_tcp() for _ in range(20)]
        uidle = d.connect_unix()
        closed = [closed_by_peer(s, 30) for s in idle]
        tap.eq(sum(closed), 20, "20 idle TCP clients closed by the daemon")
        tap.ok(closed_by_peer(uidle, 30), "an idle Unix client closed")

        # Slowloris: bytes keep coming, the line never ends.
        slow = d.connect_tcp()
        sent = 0
        cut = False
        for ch in ("observe %s stamps basket_eur 12.5" % EXP) * 4:
            try:
                slow.sendall(ch.encode())
            except OSError:
                cut = True
                break
            sent += 1
            if closed_by_peer(slow, 0.2):
                cut = True
                break
        tap.ok(cut, "slowloris client cut (after %d bytes without a "
               "newline)" % sent)
        slow.close()

        # Lines in two halves, each line ending well within the line
        # timeout, for longer than both timeouts together.
        good = d.connect_tcp()
        n = 0
        ok = True
        try:
            for i in range(12):
                line = "expose %s %s\n" % (EXP, ("control", "stamps")[i % 2])
                good.sendall(line[:10].encode())
                time.sleep(0.2)
                good.sendall(line[10:].encode())
                time.sleep(0.2)
                n += 1
        except OSError:
            ok = False
        tap.ok(ok, "a steady client sent %d lines over about 5 s" % n)
        good.shutdown(socket.SHUT_WR)
        tap.ok(closed_by_peer(good, 10), "its connection ended only when it "
               "closed")
        good.close()
        ck = d.wait_checkpoint(lambda c: Daemon.records(c, "tcp") == 12, 15)
        tap.ok(ck is not None, "all 12 of its records applied")
        lc = (ck or d.read_checkpoint())["counters"]["listen"]
        tap.eq(lc["closed"]["tcp"], {"idle": 20, "slow_line": 1,
                                     "evicted": 0},
               "tcp closes by reason")
        tap.eq(lc["closed"]["unix"], {"idle": 1, "slow_line": 0,
                                      "evicted": 0},
               "unix closes by reason")
        m = metrics(d)
        tap.eq(m.get('stopcock_clients_closed_total{source="tcp",'
                     'reason="idle"}'), 20, "/metrics: idle closes")
        tap.eq(m.get('stopcock_clients_closed_total{source="tcp",'
                     'reason="slow_line"}'), 1, "/metrics: slow_line closes")
        log = d.log_text()
        tap.eq(log.count("client closed: idle"), 21, "each idle client "
               "logged once")
        tap.eq(log.count("client closed: slow_line"), 1, "the slow one "
               "logged once")
        tap.ok(d.stop() == 0, "clean exit")


def main():
    tap = Tap()
    flood(tap)
    timeouts(tap)
    tap.done()


if __name__ == "__main__":
    main()
