"""The page in a real browser: Debian's chromium, headless, loads /?
experiment=ID from a running stopcockd (loopback only, background
networking off) and we read back the DOM it built: the harmful arm's
card must hold an inline SVG chart with its margin line and verdict
marker, the verdict must be in words, and the SRM chart must be there.
Screenshots of the experiment (laptop and phone widths) and of the list
are saved under $STOPCOCK_TEST_OUT."""
import os
import shutil
import subprocess
import sys
import tempfile
from html.parser import HTMLParser

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _httplib import OUT, Daemon, Tap, feed, harm_for  # noqa

EXP = "checkout_redesign"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--disable-default-apps",
         "--mute-audio", "--hide-scrollbars"]


def chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def run_chromium(args, url, timeout=90):
    tmp = tempfile.mkdtemp(prefix="stopcock-chromium-")
    try:
        r = subprocess.run([chromium()] + FLAGS + ["--user-data-dir=" + tmp] +
                           args + ["--virtual-time-budget=6000", url],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                           stdin=subprocess.DEVNULL, timeout=timeout,
                           env=dict(os.environ, HOME=tmp))
        return r.returncode, r.stdout.decode("utf-8", "replace"), \
            r.stderr.decode("utf-8", "replace")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


class Cards(HTMLParser):
    """Collects, per <section class="test ...">, its classes, its text and
    the classes of SVG elements inside it."""

    VOID = {"br", "img", "input", "meta", "link", "hr", "wbr", "source"}

    def __init__(self):
        super().__init__()
        self.stack = []
        self.cards = []
        self.svgs = 0
        self.banner = ""
        self.in_banner = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        cls = (a.get("class") or "").split()
        if tag == "section" and "test" in cls:
            self.cards.append({"cls": cls, "text": "", "svg": [],
                               "depth": len(self.stack)})
        if tag == "svg":
            self.svgs += 1
        if self.cards and self.open_card() and tag in (
                "line", "polygon", "polyline", "g", "circle", "svg"):
            self.cards[-1]["svg"].append((tag, a.get("class")))
        if "banner" in cls:
            self.in_banner = len(self.stack) + 1
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in self.VOID:
            return
        while self.stack:
            top = self.stack.pop()
            if top == tag:
                break
        if self.in_banner and len(self.stack) < self.in_banner:
            self.in_banner = 0

    def open_card(self):
        return self.cards and len(self.stack) > self.cards[-1]["depth"]

    def handle_data(self, data):
        if self.cards and self.open_card():
            self.cards[-1]["text"] += data
        if self.in_banner:
            self.banner += data


def main():
    t = Tap()
    if not chromium():
        t.ok(False, "chromium is installed (Debian package chromium)")
        t.done()
    d = Daemon("page")
    try:
        # A harmful arm in one experiment; a sample ratio mismatch in
        # another (the treatment loses a fifth of its exposures).
        feed(d, "feed_ranker", chunks=6, seed=5, treatment="fresh",
             skew=1.0, drop=0.3)
        feed(d, EXP)
        got = d.wait_for(lambda l: harm_for(l, EXP) and any(
            x["id"] == "feed_ranker" and x["srm"]["verdict"] == "harm"
            for x in l["experiments"]))
        t.ok(got is not None, "daemon found the harm and the mismatch")

        url = "http://127.0.0.1:%d/?experiment=%s" % (d.http, EXP)
        rc, dom, err = run_chromium(["--dump-dom", "--enable-logging=stderr",
                                     "--log-level=0"], url)
        with open(os.path.join(OUT, "page-dom.html"), "w") as f:
            f.write(dom)
        t.ok(rc == 0 and "<main" in dom, "chromium dumped the DOM",
             err[-2000:])
        js = [l for l in err.splitlines() if "CONSOLE" in l and (
            "Uncaught" in l or "Error" in l)]
        t.ok(not js, "the page's script ran without errors", "\n".join(js))
        p = Cards()
        p.feed(dom)
        harm = [c for c in p.cards if "harm" in c["cls"]]
        t.ok(len(harm) >= 1, "a card for the harmful arm",
             [c["cls"] for c in p.cards])
        if harm:
            c = harm[0]
            t.ok(("svg", None) in c["svg"], "its chart is an inline SVG",
                 c["svg"][:10])
            t.ok(("line", "margin") in c["svg"] and
                 ("line", "zero") in c["svg"],
                 "the chart has its margin and zero lines", c["svg"][:40])
            t.ok(("polygon", "band") in c["svg"] and
                 ("polyline", "estimate") in c["svg"],
                 "the chart has the band and the estimate", c["svg"][:40])
            t.ok(("g", "verdict") in c["svg"],
                 "the chart marks when the verdict fired", c["svg"][:40])
            t.ok("harm" in c["text"] and "render_mean" in c["text"]
                 and "p-value" in c["text"],
                 "the verdict is in words with the p-value", c["text"][:400])
        t.ok(p.svgs >= 3, "charts for every test and the SRM check",
             p.svgs)

        url2 = "http://127.0.0.1:%d/?experiment=feed_ranker" % d.http
        rc, dom2, err = run_chromium(["--dump-dom"], url2)
        q = Cards()
        q.feed(dom2)
        t.ok("sample ratio mismatch" in q.banner.lower() and
             "untrustworthy" in q.banner.lower(),
             "SRM banner says the experiment is untrustworthy", q.banner)
        srmcard = [c for c in q.cards if ("line", "threshold") in c["svg"]]
        t.ok(len(srmcard) == 1 and ("line", "epoch") in srmcard[0]["svg"],
             "SRM chart with its threshold and epoch start",
             [c["svg"][:8] for c in q.cards])

        # The list marks each verdict of the SRM experiment, not only
        # the experiment's row.
        rc, dom3, err = run_chromium(["--dump-dom"],
                                     "http://127.0.0.1:%d/" % d.http)
        row = dom3[dom3.find("feed_ranker"):]
        row = row[:row.find("</tr>")]
        t.ok(rc == 0 and row.count("untrustworthy") >= 2,
             "the list marks every verdict of the SRM experiment "
             "untrustworthy", row[:600])

        for name, u, size in (("page.png", url, "1280,1800"),
                              ("page-phone.png", url, "390,1600"),
                              ("page-list.png",
                               "http://127.0.0.1:%d/" % d.http, "1280,800"),
                              ("page-srm.png", url2, "1280,1800")):
            png = os.path.join(OUT, name)
            if os.path.exists(png):
                os.unlink(png)
            rc, _, err = run_chromium(["--screenshot=" + png,
                                       "--window-size=" + size], u)
            ok = rc == 0 and os.path.exists(png) and \
                os.path.getsize(png) > 10000
            if ok:
                with open(png, "rb") as f:
                    ok = f.read(8) == b"\x89PNG\r\n\x1a\n"
            t.ok(ok, "screenshot %s saved" % name, err[-1000:])
    finally:
        d.stop()
    t.done()


if __name__ == "__main__":
    main()
