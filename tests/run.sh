#!/bin/sh
# Test runner for `make check`. Every test program speaks TAP: a plan
# "1..N" (before its first result or after its last), then "ok N name" /
# "not ok N name" lines. A result whose directive is "# SKIP reason" is
# counted as skipped, whether it says ok (Python tests) or not ok (cmocka
# prints its skips so); a plan "1..0 # SKIP reason" is one skip. "# TODO"
# is not honoured: a not ok is a failure. cmocka is switched to TAP by
# CMOCKA_MESSAGE_OUTPUT; its "# ok - group" summary is a comment.
#
# A program adds one failure of its own when it exits non-zero without a
# "not ok", bails out, prints no TAP at all, or has no plan, several, one
# between results, or one that disagrees with the number of results (a
# crash half way).
#
# Runs, in order: the layer check (tools/layers.sh), unit tests of BUILD,
# of the clang build, under ASan+UBSan, the libFuzzer targets (each for a
# bounded time, tests/fuzz/run.sh), reference checks against scipy/numpy,
# integration tests against real servers. Unit tests and fuzz targets are
# found from their sources (tests/unit/test_*.c, tests/fuzz/fuzz_*.c): a
# leg given a directory that lacks one of them fails, it never skips.
# Ends with the single line "N passed, N failed, N skipped".
#
#   tests/run.sh [--unit-only] [--san DIR] [--clang DIR] [--fuzz DIR] BUILD
#   tests/run.sh [--unit-only] BUILD SANBUILD	(the older form)
unit_only=0
SANBUILD=
CLANGBUILD=
FUZZBUILD=
while [ $# -gt 0 ]; do
	case $1 in
	--unit-only) unit_only=1; shift ;;
	--san) SANBUILD=$2; shift 2 ;;
	--clang) CLANGBUILD=$2; shift 2 ;;
	--fuzz) FUZZBUILD=$2; shift 2 ;;
	--) shift; break ;;
	-*) echo "tests/run.sh: unknown option $1" >&2; exit 2 ;;
	*) break ;;
	esac
done
BUILD=${1:-build}
[ -n "${2:-}" ] && SANBUILD=$2
PY=/usr/bin/python3
OUT=$BUILD/test-output
mkdir -p "$OUT"
export STOPCOCK_BUILD="$BUILD" STOPCOCK_TEST_OUT="$OUT"
export CMOCKA_MESSAGE_OUTPUT=TAP
export ASAN_OPTIONS=detect_leaks=1:abort_on_error=0
export UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1
passed=0
failed=0
skipped=0
failures=""

# tap LOG: "PASSED FAILED SKIPPED PROBLEM" for one program's output;
# PROBLEM is empty or says what is wrong with the TAP as a whole.
tap() {
	awk '
	/^1\.\.[0-9]+([ \t#]|$)/ {
		nplan++
		plan = substr($0, 4) + 0
		before = nres
		if (plan == 0)
			skip++
		next
	}
	/^(not )?ok([ \t]|$)/ {
		nres++
		i = index($0, "#")
		if (i > 0 && tolower(substr($0, i + 1)) ~ /^[ \t]*skip/)
			skip++
		else if ($0 ~ /^not /)
			bad++
		else
			ok++
		next
	}
	/^Bail out!/ { bail = 1 }
	END {
		p = ""
		if (bail)
			p = "bailed out"
		else if (nplan == 0 && nres == 0)
			p = "printed no TAP (no plan, no results)"
		else if (nplan == 0)
			p = "no plan (1..N) for its " nres " results"
		else if (nplan > 1)
			p = nplan " plans"
		else if (before > 0 && before < nres)
			p = "plan 1.." plan " between results"
		else if (plan != nres)
			p = "plan 1.." plan " but " nres " results"
		printf "%d %d %d %s\n", ok, bad, skip, p
	}' "$1"
}

# run LABEL TIMEOUT CMD...: run one test program, count its TAP lines.
run() {
	label=$1; limit=$2; shift 2
	log="$OUT/$(echo "$label" | tr '/ ' '__').log"
	start=$(date +%s)
	timeout -k 10 "$limit" "$@" >"$log" 2>&1
	rc=$?
	tap "$log" >"$log.count"
	read -r ok bad skip problem <"$log.count"
	rm -f "$log.count"
	own=0
	if [ "$rc" -ne 0 ] && [ "$bad" -eq 0 ]; then
		own=1
		echo "not ok - $label exited with status $rc" >>"$log"
	fi
	if [ -n "$problem" ]; then
		own=1
		echo "not ok - $label: $problem" >>"$log"
	fi
	bad=$((bad + own))
	passed=$((passed + ok))
	failed=$((failed + bad))
	skipped=$((skipped + skip))
	secs=$(( $(date +%s) - start ))
	more=""
	[ "$skip" -gt 0 ] && more=" $skip skipped"
	if [ "$bad" -gt 0 ]; then
		failures="$failures $label"
		printf '%-44s %4d passed %4d FAILED%s (%ss)\n' "$label" "$ok" \
		    "$bad" "$more" "$secs"
		grep -E '^not ok|^# ' "$log" | head -20 | sed 's/^/    /'
	else
		printf '%-44s %4d passed%s (%ss)\n' "$label" "$ok" "$more" \
		    "$secs"
	fi
}

# missing LABEL WORDS...: a test that should have run and could not.
missing() {
	m=$1; shift
	failed=$((failed + 1))
	failures="$failures $m"
	printf '%-44s MISSING: %s\n' "$m" "$*"
}

# unit LEG DIR TIMEOUT: every unit test of tests/unit, built in DIR.
unit() {
	leg=$1; dir=$2; limit=$3
	n=0
	for s in tests/unit/test_*.c; do
		[ -x "$dir/tests/$(basename "$s" .c)" ] && n=$((n + 1))
	done
	if [ "$n" -eq 0 ]; then
		missing "$leg" "no unit test binaries in $dir/tests:" \
		    "that build did not run"
		return
	fi
	for s in tests/unit/test_*.c; do
		t=$dir/tests/$(basename "$s" .c)
		if [ -x "$t" ]; then
			run "$leg/$(basename "$t")" "$limit" "$t"
		else
			missing "$leg/$(basename "$t")" "$t was not built"
		fi
	done
}

# fuzz DIR: every target of tests/fuzz, built in DIR, on its seeds.
fuzz() {
	dir=$1
	n=0
	for s in tests/fuzz/fuzz_*.c; do
		[ -x "$dir/$(basename "$s" .c)" ] && n=$((n + 1))
	done
	if [ "$n" -eq 0 ]; then
		missing fuzz "no fuzz targets in $dir: that build did not run"
		return
	fi
	for s in tests/fuzz/fuzz_*.c; do
		f=$dir/$(basename "$s" .c)
		if [ -x "$f" ]; then
			run "fuzz/$(basename "$f")" 300 \
			    sh tests/fuzz/run.sh "$f" "$OUT/fuzz"
		else
			missing "fuzz/$(basename "$f")" "$f was not built"
		fi
	done
}

run layers 60 sh tools/layers.sh "$BUILD" ${CLANGBUILD:+"$CLANGBUILD"}
unit unit "$BUILD" 300
[ -n "$CLANGBUILD" ] && unit clang "$CLANGBUILD" 300
[ -n "$SANBUILD" ] && unit asan "$SANBUILD" 600
[ -n "$FUZZBUILD" ] && fuzz "$FUZZBUILD"
if [ "$unit_only" = 0 ]; then
	for t in tests/ref/*.py; do
		[ -f "$t" ] || continue
		case "$(basename "$t")" in _*) continue ;; esac
		run "ref/$(basename "$t" .py)" 600 $PY "$t"
	done
	for t in tests/it/*.py tests/it/*.sh; do
		[ -f "$t" ] || continue
		case "$(basename "$t")" in _*) continue ;; esac
		case "$t" in
		*.py) run "it/$(basename "$t" .py)" 600 $PY "$t" ;;
		*.sh) run "it/$(basename "$t" .sh)" 600 sh "$t" ;;
		esac
	done
fi
[ -n "$failures" ] && echo "failed:$failures (logs in $OUT)"
echo "$passed passed, $failed failed, $skipped skipped"
[ "$failed" -eq 0 ]
