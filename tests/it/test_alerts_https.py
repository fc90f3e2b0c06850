"""test_alerts_https: webhooks over HTTPS with certificate verification on.

The test makes its own CA and a server certificate for 127.0.0.1 with the
openssl command line, and runs stopcockd in a private mount namespace
(unshare -m, as root) where libcurl's CA bundle
(/etc/ssl/certs/ca-certificates.crt, Debian's --with-ca-bundle) is the test
CA; the host's bundle is untouched. Two HTTPS receivers (Python's
http.server wrapped by the ssl module):

  trusted     certificate signed by the test CA: the signed alert arrives.
  selfsigned  a self-signed certificate for the same address: the daemon
              must refuse the TLS handshake (no verification is disabled)
              and keep the alert for retry.

Invented scenario: a recipe box's "box_v3" experiment whose error share
goes from 2% to 9% (guardrail "errors", proportion).
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _lib import Daemon, Tap, metrics, wait_for  # noqa: E402
from _alertlib import (SECRET, Receiver, harmful_records,  # noqa: E402
                       make_certs, namespace_wrap, unshare_ok)

GUARDRAILS = """
[guardrail errors]
metric = errors
test = proportion
harm = increase
"""


def main():
    tap = Tap()
    if not unshare_ok():
        print("ok 1 # SKIP unshare -m not permitted here "
              "(needs root with CAP_SYS_ADMIN)")
        print("1..1")
        return
    d = Daemon("alerts-https", guardrails=GUARDRAILS, udp=False,
               unix=False, http=True, start=False)
    certs = make_certs(d.dir)
    trusted = Receiver(tls=(certs["srv.pem"], certs["srv.key"]))
    selfsigned = Receiver(tls=(certs["self.pem"], certs["self.key"]))
    d.write_conf(d.conf_text + """
[webhook trusted]
url = %s
secret = %s

[webhook selfsigned]
url = %s
secret = %s
""" % (trusted.url, SECRET, selfsigned.url, SECRET))
    namespace_wrap(d, ca_bundle=certs["ca.pem"])
    with d:
        d.start()
        d.send_tcp(harmful_records("box_v3", "errors", 3000, 0.02, 0.09, 31))
        got = trusted.wait(lambda r: r, 20)
        reqs = trusted.snapshot()
        tap.ok(got and trusted.url.startswith("https://"),
               "trusted: the alert arrives over HTTPS")
        tap.eq([(r["status"], r["error"], (r["json"] or {}).get("alert"))
                for r in reqs], [(200, None, "harm")],
               "trusted: once, with a valid signature")
        m = wait_for(lambda: (lambda m: m if m.get(
            'stopcock_webhook_retries_total{receiver="selfsigned"}', 0) >= 1
            else None)(metrics(d)), 10) or {}
        tap.eq(selfsigned.snapshot(), [],
               "selfsigned: no request got through the TLS handshake")
        tap.ok(m.get('stopcock_webhook_retries_total{receiver="selfsigned"}',
                     0) >= 1 and
               m.get('stopcock_webhook_queued{receiver="selfsigned"}') == 1
               and m.get('stopcock_webhook_sent_total{receiver="trusted"}')
               == 1, "selfsigned: refused and kept for retry; trusted sent",
               repr({k: v for k, v in m.items() if "webhook" in k}))
        tap.ok("certificate" in d.log_text().lower(),
               "the log names the certificate problem")
    trusted.close()
    selfsigned.close()
    tap.done()


if __name__ == "__main__":
    main()
