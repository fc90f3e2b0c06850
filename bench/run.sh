#!/bin/sh
# bench/run.sh BUILD: `make bench`. Measures, on this machine and in this
# one run, every figure of the performance targets and writes them to
# bench/results.json (the previous file is kept as results.prev.json and
# compared):
#   1. replay throughput on >= 10 million generated records with every
#      guardrail kind active, beside `wc -l` and a one-line mawk tally
#      (records and sums per arm) on the same file, as ratios;
#   2. stopcockd's ingest rate over TCP on loopback and over a Redis
#      stream (batched entries), beside redis-benchmark's XADD rate on the
#      same redis-server (bench/ingest.py);
#   2b. Kafka: aggregate ingest of three daemons of one consumer group
#      beside one daemon, same generated records, same run, on
#      librdkafka's mock cluster (bench/kafka.py);
#   3. memory per series (resident-size growth over 10,000 experiments x
#      3 arms x 4 metrics, divided out) and the cost of one engine tick at
#      that scale (tests/tools/engine_bench.c);
#   4. A/A false-alarm rates and detection medians from a larger
#      `stopcock simulate` run;
#   5. the adversarial validity suite with >= 1000 null runs per cell and
#      the power ratios beside a Wald SPRT (tests/ref/test_adversary.py
#      --full), written to $BUILD/adversary.json; failing cells are
#      reported, they do not stop the bench;
#   6. harm that starts late: delays after 20k, 200k and 1M healthy units
#      for every guardrail kind, beside a test started at the change and
#      a CUSUM at the true effect (tests/ref/test_lateharm.py --full),
#      written to $BUILD/lateharm.json; targets not met are reported.
# Nothing is hard-coded: every number printed is measured here.
set -eu
BUILD=${1:-build}
S=$BUILD/stopcock
PY=/usr/bin/python3
CONF=bench/bench.conf
N=${BENCH_RECORDS:-10000000}
TMP=$(mktemp -d "${TMPDIR:-/tmp}/stopcock-bench.XXXXXX")
trap 'rm -rf "$TMP"' EXIT INT TERM
start=$(date +%s)

now() { date +%s.%N; }
since() { awk -v a="$1" -v b="$(now)" 'BEGIN { printf "%.3f", b - a }'; }
say() { printf 'bench: %s\n' "$*" >&2; }

say "generating $N records (100 experiments, every guardrail kind)"
t=$(now)
$S generate -c $CONF --experiments 100 --records "$N" --rate 50000 \
    --seed 1 > "$TMP/records.txt"
gen_s=$(since "$t")
cat "$TMP/records.txt" > /dev/null	# same page cache for all three

say "wc -l"
t=$(now)
wc_lines=$(wc -l < "$TMP/records.txt")
wc_s=$(since "$t")

say "mawk tally"
t=$(now)
mawk '{ k = $3 " " $4; n[k]++; s[k] += $6 } END { for (k in n) print k, n[k], s[k] }' \
    "$TMP/records.txt" > "$TMP/tally.txt"
mawk_s=$(since "$t")

say "stopcock replay"
t=$(now)
$S replay -q -c $CONF "$TMP/records.txt" > "$TMP/verdicts.txt" \
    2> "$TMP/replay.err"
replay_s=$(since "$t")

say "daemon ingest: TCP and Redis"
$PY bench/ingest.py "$BUILD" "$TMP/records.txt" $CONF 2000000 \
    > "$TMP/ingest.json"
rm -f "$TMP/records.txt"

say "daemon ingest: Kafka, one daemon and three (mock cluster)"
$PY bench/kafka.py "$BUILD" $CONF 1000000 > "$TMP/kafka.json"

say "memory and tick: 10,000 experiments x 3 arms x 4 metrics"
$S generate -c $CONF --experiments 10000 --arms control=34,b=33,c=33 \
    --records 3000000 --rate 40000 --seed 2 > "$TMP/mem.txt"
"$BUILD/tests/engine_bench" $CONF "$TMP/mem.txt" > "$TMP/mem.json"
rm -f "$TMP/mem.txt"

# Runs as long as the tests are tuned for (plan_units = 20000 per arm,
# 5 records per unit), ticking once per 1000 records (1 s at 1000/s).
say "simulate: A/A, 1000 runs"
$S simulate -c $CONF --runs 1000 --horizon 200001 -j 2 --seed 3 --json \
    > "$TMP/sim_aa.json"
say "simulate: harm in every guardrail kind, 200 runs"
$S simulate -c $CONF --runs 200 --horizon 300001 -j 2 --seed 4 --json \
    --effect latency_ms=+15%,above=0.95 --effect server_errors=+50% \
    --effect crashes=+40% --effect render_ms=+8% > "$TMP/sim_harm.json"

[ -f bench/results.json ] && cp bench/results.json bench/results.prev.json
$PY bench/report.py "$TMP" "$N" "$gen_s" "$wc_lines" "$wc_s" "$mawk_s" \
    "$replay_s" "$(( $(date +%s) - start ))" > bench/results.json.tmp
mv bench/results.json.tmp bench/results.json
say "wrote bench/results.json"

say "adversarial validity: >= 1000 runs per cell, and power"
if STOPCOCK_BUILD="$BUILD" $PY tests/ref/test_adversary.py --full \
    --json "$BUILD/adversary.json" > "$BUILD/adversary.tap"; then
	say "adversary: every cell within its bound ($BUILD/adversary.json)"
else
	say "adversary: cells over their bound:"
	grep '^not ok' "$BUILD/adversary.tap" >&2 || true
fi

say "late harm: 20k, 200k and 1M healthy units before the change"
if STOPCOCK_BUILD="$BUILD" $PY tests/ref/test_lateharm.py --full \
    --json "$BUILD/lateharm.json" > "$BUILD/lateharm.tap"; then
	grep -E '^# +(kind +H|(proportion|rate|mean|quantile) +[0-9])' \
	    "$BUILD/lateharm.tap" >&2 || true
	grep '^not ok' "$BUILD/lateharm.tap" >&2 || true
	say "late harm: figures in $BUILD/lateharm.json"
else
	say "late harm: the run failed (see $BUILD/lateharm.tap)"
fi
