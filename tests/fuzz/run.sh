#!/bin/sh
# Run one libFuzzer target for tests/run.sh, in TAP:
#   1  every seed of tests/fuzz/corpus/NAME runs clean on its own;
#   2  FUZZ_RUNS inputs mutated from the seeds (default 100000, stopped
#      after FUZZ_TIME seconds, default 20) give no crash, abort, leak,
#      undefined behaviour or slow input.
# The random seed is fixed (FUZZ_SEED, default 1) so a run repeats.
# Inputs the run finds go to OUT/NAME-corpus (emptied first), never into
# the committed seeds; a failing input is saved as OUT/NAME-crash-* (or
# -leak-, -timeout-, -oom-); rerun it with BIN FILE.
#
#   tests/fuzz/run.sh BIN OUT
bin=$1
out=$2
name=$(basename "$bin")
seeds=tests/fuzz/corpus/$name
runs=${FUZZ_RUNS:-100000}
secs=${FUZZ_TIME:-20}
seed=${FUZZ_SEED:-1}
slog=$out/$name.seeds.log
log=$out/$name.fuzz.log
work=$out/$name-corpus

echo "1..2"
# diag FILE: the end of a fuzzer log, where libFuzzer reports a failure.
diag() {
	grep -E 'ERROR|SUMMARY|runtime error|Test unit written|^==' "$1" |
	    head -20 | sed 's/^/# /'
	tail -5 "$1" | sed 's/^/# /'
}

nseeds=$(find "$seeds" -type f 2>/dev/null | wc -l)
if [ "$nseeds" -eq 0 ]; then
	echo "not ok 1 - $name: no seeds in $seeds"
	echo "not ok 2 - $name: nothing to fuzz from"
	exit 1
fi
mkdir -p "$out" || exit 1
rm -rf "$work" && mkdir -p "$work" || exit 1
rc=0

# Files given one by one: libFuzzer runs each once, no mutation.
if find "$seeds" -type f -print0 | sort -z |
    xargs -0 "$bin" -artifact_prefix="$out/$name-" >"$slog" 2>&1; then
	echo "ok 1 - $name: its $nseeds seeds run clean"
else
	echo "not ok 1 - $name: a seed fails (log $slog)"
	diag "$slog"
	rc=1
fi

if "$bin" -seed="$seed" -runs="$runs" -max_total_time="$secs" \
    -timeout=10 -rss_limit_mb=1024 -print_final_stats=1 \
    -artifact_prefix="$out/$name-" "$work" "$seeds" >"$log" 2>&1
then
	done_line=$(grep -E '^Done [0-9]+ runs' "$log" | tail -1)
	echo "ok 2 - $name: ${done_line:-no Done line} (seed $seed)"
else
	echo "not ok 2 - $name: fuzzing failed (seed $seed, log $log)"
	diag "$log"
	rc=1
fi
exit $rc
