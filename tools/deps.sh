#!/bin/sh
# Install step shared by `make check`, `make demo` and `make bench`: find
# the Debian packages stopcock needs; when some are missing and we are
# root with apt-get, install them, otherwise print the exact command.
# libclang-rt-dev holds clang's sanitizer and libFuzzer runtimes (only
# recommended by clang, and recommends are not installed here).
PKGS="build-essential pkg-config clang libclang-rt-dev libevent-dev libgsl-dev
libhiredis-dev libjansson-dev libinih-dev libcmocka-dev libcurl4-openssl-dev
libssl-dev libsystemd-dev librdkafka-dev redis-server redis-tools python3
python3-scipy python3-numpy python3-prometheus-client chromium systemd mawk
curl openssl"
missing=""
for p in $PKGS; do
	dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "ok installed" ||
	    missing="$missing $p"
done
[ -z "$missing" ] && exit 0
if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
	echo "deps: installing:$missing"
	export DEBIAN_FRONTEND=noninteractive
	apt-get update -qq >/dev/null &&
	    apt-get install -y -qq --no-install-recommends $missing >/dev/null ||
	    { echo "deps: apt-get install failed" >&2; exit 1; }
	exit 0
fi
echo "deps: missing Debian packages; run as root:" >&2
echo "  apt-get install -y$missing" >&2
exit 1
