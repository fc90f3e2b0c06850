#!/bin/sh
# Test runner for `make check`. Every test program speaks TAP ("ok N name"
# / "not ok N name"; cmocka is switched to TAP by CMOCKA_MESSAGE_OUTPUT).
# Runs, in order: unit tests, unit tests under ASan+UBSan, reference
# checks against scipy/numpy, integration tests against real servers.
# Ends with the single line "N passed, N failed".
#
#   tests/run.sh [--unit-only] BUILD [SANBUILD]
unit_only=0
[ "$1" = "--unit-only" ] && { unit_only=1; shift; }
BUILD=${1:-build}
SANBUILD=${2:-}
PY=/usr/bin/python3
OUT=$BUILD/test-output
mkdir -p "$OUT"
export STOPCOCK_BUILD="$BUILD" STOPCOCK_TEST_OUT="$OUT"
export CMOCKA_MESSAGE_OUTPUT=TAP
export ASAN_OPTIONS=detect_leaks=1:abort_on_error=0
export UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1
passed=0
failed=0
failures=""

# run LABEL TIMEOUT CMD...: run one test program, count its TAP lines.
run() {
	label=$1; limit=$2; shift 2
	log="$OUT/$(echo "$label" | tr '/ ' '__').log"
	start=$(date +%s)
	timeout -k 10 "$limit" "$@" >"$log" 2>&1
	rc=$?
	ok=$(grep -cE '^ok ' "$log")
	bad=$(grep -cE '^not ok ' "$log")
	if [ "$rc" -ne 0 ] && [ "$bad" -eq 0 ]; then
		bad=1
		echo "not ok - $label exited with status $rc" >>"$log"
	fi
	passed=$((passed + ok))
	failed=$((failed + bad))
	secs=$(( $(date +%s) - start ))
	if [ "$bad" -gt 0 ]; then
		failures="$failures $label"
		printf '%-44s %4d passed %4d FAILED (%ss)\n' "$label" "$ok" "$bad" "$secs"
		grep -E '^not ok|^# ' "$log" | head -20 | sed 's/^/    /'
	else
		printf '%-44s %4d passed (%ss)\n' "$label" "$ok" "$secs"
	fi
}

for t in "$BUILD"/tests/test_*; do
	[ -x "$t" ] || continue
	run "unit/$(basename "$t")" 300 "$t"
done
if [ -n "$SANBUILD" ]; then
	for t in "$SANBUILD"/tests/test_*; do
		[ -x "$t" ] || continue
		run "asan/$(basename "$t")" 600 "$t"
	done
fi
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
echo "$passed passed, $failed failed"
[ "$failed" -eq 0 ]
