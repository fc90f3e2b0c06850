"""test_page_untrusted: what the page and `stopcock status` say about safe,
untrusted and pinned-plan experiments, read back from a real stopcockd
through Debian's chromium (headless, as test_page_chromium.py runs it) and
the real CLI.

Invented scenario: a herb nursery's experiments, guardrail "wilt"
(proportion, harm = increase, margin 0.05, unit = pct), the same 10%
wilt share in both arms, so it becomes safe:
  herbs_ok      plain: the safe card is green, says the bound that rules
                harm out (with the unit), not a p-value;
  herbs_srm     exposures skewed 150/350 against a 50/50 plan first: its
                safe verdict is untrustworthy, so nothing about it may be
                green: the card and the list show it amber, in words;
  herbs_pinned  planned in the configuration: its epoch table must not
                say it started in 1970.
Dark mode: a screenshot with chromium's --force-dark-mode (which makes
prefers-color-scheme match dark) must have dark paper, one without it
light paper; the luminance (ITU-R BT.601 weights, from memory) of the
page's background is read from the PNG, decoded here with zlib and numpy
(PNG filters from the PNG specification, sec. 9).
"""
import os
import struct
import subprocess
import sys
import time
import zlib

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import STOPCOCK, OUT, Daemon, Tap, wait_for  # noqa: E402
from _alertlib import unit_records  # noqa: E402
from test_page_chromium import Cards, chromium, run_chromium  # noqa: E402

GUARDRAILS = """
[guardrail wilt]
metric = wilt
test = proportion
harm = increase
margin = 0.05
unit = pct

[experiment herbs_pinned]
plan = control=50 treatment=50
"""


def png_rows(path, nrows):
    """The first nrows rows of an 8-bit RGB(A) PNG as a numpy array."""
    with open(path, "rb") as f:
        data = f.read()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, w = 8, b"", 0
    while pos < len(data):
        n, kind = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + n]
        if kind == b"IHDR":
            w, h, depth, ctype, _, _, lace = struct.unpack(">IIBBBBB", body)
            assert depth == 8 and ctype in (2, 6) and lace == 0
            bpp = 3 if ctype == 2 else 4
        elif kind == b"IDAT":
            idat += body
        pos += 12 + n
    raw = zlib.decompress(idat)
    stride = w * bpp
    prev = np.zeros(stride, dtype=np.int32)
    out = []
    for r in range(min(nrows, len(raw) // (stride + 1))):
        ft = raw[r * (stride + 1)]
        line = np.frombuffer(raw, dtype=np.uint8, count=stride,
                             offset=r * (stride + 1) + 1).astype(np.int32)
        cur = np.zeros(stride, dtype=np.int32)
        if ft == 0:
            cur = line.copy()
        elif ft == 2:
            cur = (line + prev) & 255
        else:
            for i in range(stride):
                a = cur[i - bpp] if i >= bpp else 0
                b = prev[i]
                c = prev[i - bpp] if i >= bpp else 0
                if ft == 1:
                    p = a
                elif ft == 3:
                    p = (a + b) // 2
                else:  # Paeth
                    pa, pb, pc = abs(b - c), abs(a - c), abs(a + b - 2 * c)
                    p = a if pa <= pb and pa <= pc else b if pb <= pc else c
                cur[i] = (line[i] + p) & 255
        out.append(cur.reshape(w, bpp)[:, :3])
        prev = cur
    return np.array(out)


def luminance(path):
    """Median luminance of rows 70-110 (below the header bar)."""
    rows = png_rows(path, 110)[70:110].reshape(-1, 3)
    y = 0.299 * rows[:, 0] + 0.587 * rows[:, 1] + 0.114 * rows[:, 2]
    return float(np.median(y))


def status(d, *args):
    return subprocess.run([STOPCOCK, "status", "--url",
                           "http://127.0.0.1:%d" % d.http] + list(args),
                          capture_output=True, text=True, timeout=30,
                          env=dict(os.environ, NO_COLOR="1")).stdout


def main():
    tap = Tap()
    if not chromium():
        tap.ok(False, "chromium is installed (Debian package chromium)")
        tap.done()
    with Daemon("page-untrusted", guardrails=GUARDRAILS, udp=False,
                unix=False, http=True) as d:
        d.send_tcp(unit_records("herbs_ok", "wilt", [
            ("control", 3000, 0.10), ("treatment", 3000, 0.10)], 21))
        lines = unit_records("herbs_srm", "wilt", [
            ("control", 3000, 0.10), ("treatment", 3000, 0.10)], 22,
            skew={"control": 150, "treatment": 350})
        d.send_tcp(lines[:501])
        time.sleep(0.5)
        d.send_tcp(lines[501:])
        d.send_tcp(["expose herbs_pinned control",
                    "count herbs_pinned control wilt 0 1"])
        import http.client
        import json

        def api(path):
            c = http.client.HTTPConnection("127.0.0.1", d.http, timeout=10)
            try:
                c.request("GET", path)
                return json.loads(c.getresponse().read())
            finally:
                c.close()

        def verdicts():
            out = {}
            for x in api("/api/experiments")["experiments"]:
                for g in x["guardrails"]:
                    out[x["id"]] = (g["verdict"], x.get("untrusted"))
            return out
        got = wait_for(lambda: verdicts().get("herbs_ok", ("",))[0] ==
                       "safe" and verdicts().get("herbs_srm") ==
                       ("safe", True), 40, 0.3)
        tap.ok(got, "herbs_ok safe; herbs_srm safe but untrusted",
               repr(verdicts()))

        base = "http://127.0.0.1:%d/" % d.http
        rc, dom, err = run_chromium(["--dump-dom"],
                                    base + "?experiment=herbs_srm")
        p = Cards()
        p.feed(dom)
        wilt = [c for c in p.cards if "wilt" in c["text"]]
        tap.ok(wilt and "safe" not in wilt[0]["cls"] and
               "untrusted (sample ratio mismatch)" in wilt[0]["text"],
               "herbs_srm: the safe card is not green; it says untrusted "
               "in words", repr([(c["cls"], c["text"][:120])
                                 for c in wilt]))
        rc, dom, err = run_chromium(["--dump-dom"],
                                    base + "?experiment=herbs_ok")
        p = Cards()
        p.feed(dom)
        ok = [c for c in p.cards if "wilt" in c["text"]]
        tap.ok(ok and "safe" in ok[0]["cls"],
               "herbs_ok: its safe card is green (the check can tell)",
               repr([c["cls"] for c in ok]))
        txt = ok[0]["text"] if ok else ""
        tap.ok("harm ruled out" in txt and "at most" in txt and
               "pct" in txt and "p-value" not in txt,
               "herbs_ok: the bound that rules harm out, with its unit, "
               "no p-value", txt[:600])

        rc, dom, err = run_chromium(["--dump-dom"], base)
        row = dom[dom.find(">herbs_srm<"):]
        row = row[:row.find("</tr>")]
        tap.ok(row and "state safe" not in row and "untrusted" in row,
               "list: herbs_srm's verdict is not shown as safe", row[:500])
        row = dom[dom.find(">herbs_ok<"):]
        row = row[:row.find("</tr>")]
        tap.ok("state safe" in row, "list: herbs_ok's is", row[:300])

        rc, dom, err = run_chromium(["--dump-dom"],
                                    base + "?experiment=herbs_pinned")
        tap.ok("epoch" in dom and "1970" not in dom,
               "herbs_pinned: no epoch started in 1970",
               dom[dom.find("started"):][:300])

        shots = {}
        for name, flags in (("light", []), ("dark", ["--force-dark-mode"])):
            png = os.path.join(OUT, "page-untrusted-%s.png" % name)
            if os.path.exists(png):
                os.unlink(png)
            run_chromium(["--screenshot=" + png, "--window-size=390,900"]
                         + flags, base + "?experiment=herbs_srm")
            shots[name] = luminance(png) if os.path.exists(png) else None
        tap.ok(shots["light"] is not None and shots["light"] > 180,
               "light mode: light paper", repr(shots))
        tap.ok(shots["dark"] is not None and shots["dark"] < 60,
               "dark mode (prefers-color-scheme): dark paper", repr(shots))

        out = status(d)
        line = [ln for ln in out.splitlines() if "wilt" in ln and
                "safe" in ln]
        tap.ok(line and "p=" not in line[0] and "harm ruled out" in line[0],
               "status: a safe verdict says harm is ruled out, no p",
               out)
        out = status(d, "herbs_ok")
        line = [ln for ln in out.splitlines() if ln.startswith("safe")]
        tap.ok(line and "<=+" in line[0] and "pct" in line[0],
               "status EXP: the bound (<=) with the unit", out)
    tap.done()


if __name__ == "__main__":
    main()
