#!/usr/bin/env bash
# What learning in step costs a replay: a learning daemon (no model, refit every 8 labelled
# trials, recording) is fed the same 64 units × 8 stimuli session (TRIALS per stimulus, default
# 20) as fast as it goes, twice — learning at its own pace as it would live
# (`replay --learn-at-own-pace`), then in step (`replay`'s default) — and each run's wall time,
# refits and labelled accuracy are printed, with the accuracy of `decode --prequential` of the
# tables (refits every 8 labelled trials: what the real-time session gives). Usage: tests/bench/learn-in-step.sh [TRIALS] after a release build.
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
TRIALS=${1:-20}
W=$(mktemp -d)
DPID=
trap 'kill $DPID 2>/dev/null || true; rm -rf "$W"' EXIT
tests/bench/scenario.sh 64 8 "$TRIALS" 64008 > "$W/scenario.toml"
$BIN simulate --scenario "$W/scenario.toml" --out-dir "$W/d" >/dev/null
SESSION_S=$(awk -F, 'NR>1 {t=$2} END {print t+0.25}' "$W/d/trials.csv")
echo "session: 64 units × 8 stimuli, $((TRIALS * 8)) trials, ${SESSION_S} s"
for mode in own-pace in-step; do
  P=$((20000 + RANDOM % 20000))
  mkdir -p "$W/rec-$mode"
  $BIN daemon --ingest tcp://127.0.0.1:$P --publish tcp://127.0.0.1:$((P+1)) \
    --control tcp://127.0.0.1:$((P+2)) --task-ingest "" --record "$W/rec-$mode/" 2>"$W/daemon-$mode.log" &
  DPID=$!
  sleep 1
  FLAG=$([ $mode = own-pace ] && echo --learn-at-own-pace || true)
  T0=$(date +%s.%N)
  $BIN replay --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" --to tcp://127.0.0.1:$P \
    --control tcp://127.0.0.1:$((P+2)) --fast $FLAG >/dev/null 2>&1
  # The session ends once the daemon has taken every message; wait for its summary.
  until $BIN status --control tcp://127.0.0.1:$((P+2)) | grep -q "^session-end"; do sleep 0.2; done
  T1=$(date +%s.%N)
  ST=$($BIN status --control tcp://127.0.0.1:$((P+2)))
  kill $DPID; wait $DPID 2>/dev/null || true; DPID=
  REFITS=$(echo "$ST" | sed -nE 's/.* ([0-9]+) refits.*/\1/p')
  RIGHT=$(echo "$ST" | sed -nE 's/^session-end.* ([0-9.]+% right of [0-9]+ labelled).*/\1/p')
  RIGHT=${RIGHT:-nothing decoded}
  awk -v m=$mode -v a="$T0" -v b="$T1" -v s="$SESSION_S" -v r="$REFITS" -v ok="$RIGHT" \
    'BEGIN { printf "%-9s %7.1f s wall (%.1f× real time), %s refits, %s\n", m, b-a, s/(b-a), r, ok }'
done
$BIN decode --prequential --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" --out-dir "$W/pq" 2>/dev/null \
  | sed -nE 's/.*accuracy ([0-9.]+% of [0-9]+ labelled).*/decode --prequential of the tables: \1/p'
