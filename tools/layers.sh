#!/bin/sh
# Layer check for `make check`, in TAP. The layering DEVELOPERS.md
# describes, checked on the #include lines and on the binaries' links:
#   - nothing under src/core includes a shell library (libevent, hiredis,
#     libcurl, libsystemd, librdkafka, syslog, sockets, polling) or a header of
#     src/daemon or src/cli;
#   - src/daemon and src/cli never include each other's headers;
#   - for each BUILD given: BUILD/stopcock needs no libevent, hiredis,
#     libsystemd or librdkafka, and BUILD/stopcockd does need them (which also proves
#     the check reads the dynamic section at all).
# A quoted include is resolved as the compiler does (the including file's
# directory, then include/), so a header is judged by where it lives.
#
#   tools/layers.sh [BUILD...]
cd "$(dirname "$0")/.." || exit 1

# Shell libraries, as patterns on the text between <> or "".
SHELL_LIBS='^(event2/|event\.h$|evhttp\.h$|hiredis|adapters/|curl/|systemd/'
SHELL_LIBS=$SHELL_LIBS'|librdkafka/'
SHELL_LIBS=$SHELL_LIBS'|syslog\.h$|sys/socket\.h$|sys/un\.h$|netinet/|arpa/'
SHELL_LIBS=$SHELL_LIBS'|netdb\.h$|ifaddrs\.h$|poll\.h$|sys/poll\.h$'
SHELL_LIBS=$SHELL_LIBS'|sys/epoll\.h$|sys/select\.h$|sys/event\.h$|pthread\.h$'
SHELL_LIBS=$SHELL_LIBS'|signal\.h$)'

n=0
nfail=0

# result OK NAME [DIAGNOSTIC-FILE]: print one TAP line, then the file's
# lines as diagnostics on failure.
result() {
	n=$((n + 1))
	if [ "$1" = 1 ]; then
		echo "ok $n - $2"
	else
		nfail=$((nfail + 1))
		echo "not ok $n - $2"
		[ -n "$3" ] && sed 's/^/# /' "$3"
	fi
}

# includes DIR...: "file<TAB>line<TAB>kind<TAB>name<TAB>resolved" for every
# #include in the .c and .h files under DIRs; kind is "<" or "\"",
# resolved the repository path a quoted include names ("" if none).
includes() {
	find "$@" -name '*.[ch]' -type f | sort | while read -r f; do
		awk -v f="$f" '
		/^[ \t]*#[ \t]*include[ \t]*[<"]/ {
			s = $0
			sub(/^[ \t]*#[ \t]*include[ \t]*/, "", s)
			k = substr(s, 1, 1)
			s = substr(s, 2)
			sub(/[>"].*$/, "", s)
			printf "%s\t%d\t%s\t%s\n", f, FNR, k, s
		}' "$f"
	done | while IFS='	' read -r f line kind name; do
		res=""
		if [ "$kind" = '"' ]; then
			for cand in "$(dirname "$f")/$name" "include/$name"; do
				if [ -f "$cand" ]; then
					res=$(realpath --relative-to=. "$cand")
					break
				fi
			done
		fi
		printf '%s\t%s\t%s\t%s\t%s\n' "$f" "$line" "$kind" "$name" \
		    "$res"
	done
}

tmp=$(mktemp -d) || exit 1
trap 'rm -rf "$tmp"' EXIT

includes src/core >"$tmp/core"
includes src/daemon >"$tmp/daemon"
includes src/cli >"$tmp/cli"

echo "1..$((5 + 2 * $#))"

# Each scan must have seen include lines, or every rule below would pass
# on nothing.
ok=1
: >"$tmp/diag"
for l in core daemon cli; do
	if [ ! -s "$tmp/$l" ]; then
		ok=0
		echo "no #include lines found under src/$l" >>"$tmp/diag"
	fi
done
result $ok "the scan found include lines in src/core, src/daemon, src/cli" \
    "$tmp/diag"

# violations FILE AWK-CONDITION: the include lines matching, as
# "file:line: #include name".
violations() {
	SHELL_LIBS=$SHELL_LIBS awk -F '\t' 'BEGIN { re = ENVIRON["SHELL_LIBS"] }
	    '"$2"' { printf "%s:%s: #include %s\n", $1, $2, $4 }' "$1"
}

violations "$tmp/core" '$4 ~ re' >"$tmp/diag"
[ -s "$tmp/diag" ] && ok=0 || ok=1
result $ok "src/core includes no shell library (libevent, hiredis, curl,\
 systemd, syslog, sockets)" "$tmp/diag"

violations "$tmp/core" '$5 ~ /^src\/(daemon|cli)\//' >"$tmp/diag"
[ -s "$tmp/diag" ] && ok=0 || ok=1
result $ok "src/core includes no header of src/daemon or src/cli" "$tmp/diag"

violations "$tmp/daemon" '$5 ~ /^src\/cli\//' >"$tmp/diag"
[ -s "$tmp/diag" ] && ok=0 || ok=1
result $ok "src/daemon includes no header of src/cli" "$tmp/diag"

violations "$tmp/cli" '$5 ~ /^src\/daemon\//' >"$tmp/diag"
[ -s "$tmp/diag" ] && ok=0 || ok=1
result $ok "src/cli includes no header of src/daemon" "$tmp/diag"

# needed BIN: the binary's DT_NEEDED libraries, one a line.
needed() {
	readelf -d "$1" 2>/dev/null | sed -n 's/.*(NEEDED).*\[\(.*\)\]/\1/p'
}

DAEMON_LIBS='^lib(event|hiredis|systemd|rdkafka)'
for b in "$@"; do
	: >"$tmp/diag"
	if [ -f "$b/stopcock" ]; then
		needed "$b/stopcock" | grep -E "$DAEMON_LIBS" >"$tmp/diag"
		[ -s "$tmp/diag" ] && ok=0 || ok=1
	else
		ok=0
		echo "$b/stopcock: no such file" >"$tmp/diag"
	fi
	result $ok "$b/stopcock needs no libevent, hiredis, libsystemd or \
librdkafka" \
	    "$tmp/diag"
	ok=0
	if [ -f "$b/stopcockd" ]; then
		needed "$b/stopcockd" >"$tmp/diag"
		[ "$(grep -cE "$DAEMON_LIBS" "$tmp/diag")" -eq 4 ] && ok=1
	else
		echo "$b/stopcockd: no such file" >"$tmp/diag"
	fi
	result $ok "$b/stopcockd needs libevent, hiredis, libsystemd and \
librdkafka" \
	    "$tmp/diag"
done
[ "$nfail" -eq 0 ]
