#!/bin/sh
# bench/identical.sh BUILD REFDIR: a speed change must not change a single
# verdict, number or bit. The first run (REFDIR without outputs) records,
# with BUILD, what every stream in REFDIR gives; later runs (another build)
# compare byte for byte and fail on any difference:
#   - `stopcock replay` stdout (the verdict lines) and its --report charts;
#   - tests/statedump: every finding, the full state image (tallies,
#     sketches, unit groups) and each experiment's API view, 17 digits.
# REFDIR holds the streams as *.txt, made beforehand with `stopcock
# generate` (unit= can be added with awk: every record after an expose
# gets " unit=u" (exposes % 150000)).
set -eu
BUILD=$1
REF=$2
CONF=${CONF:-bench/bench.conf}
fail=0
for f in "$REF"/*.txt; do
	b=$(basename "$f" .txt)
	out=$REF/out.$b
	mode=compare
	[ -d "$out" ] || { mode=record; mkdir -p "$out/report"; }
	new=$(mktemp -d "${TMPDIR:-/tmp}/identical.XXXXXX")
	mkdir -p "$new/report"
	"$BUILD/stopcock" replay -q -c "$CONF" --report "$new/report" "$f" \
	    > "$new/replay.json" 2> "$new/replay.err"
	"$BUILD/tests/statedump" "$CONF" "$f" > "$new/state.json"
	if [ $mode = record ]; then
		cp -r "$new/." "$out/"
		echo "identical: $b: recorded ($(wc -l < "$out/replay.json") verdict lines)"
	elif diff -r "$out" "$new" > /dev/null; then
		echo "identical: $b: same"
	else
		echo "identical: $b: DIFFERENT" >&2
		diff -rq "$out" "$new" >&2 || true
		fail=1
	fi
	rm -rf "$new"
done
exit $fail
