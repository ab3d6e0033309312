#!/usr/bin/env bash
# Replay throughput at 64 units × 16 stimuli: writes a scenario (one third each Poisson,
# negative binomial and COM-Poisson units), simulates 20 trials per stimulus, fits, starts a
# daemon on loopback and replays the session with `--fast` (ending with the daemon's
# acknowledgement of the last message). Usage: tests/bench/replay-64x16.sh after a release build.
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
W=$(mktemp -d)
trap 'kill $DPID 2>/dev/null || true; rm -rf "$W"' EXIT
{
  echo 'description = "replay benchmark, 64 units x 16 stimuli"'
  printf 'stimuli = ['
  for s in $(seq 0 15); do printf '["d%d", %d.0]%s' $s $((s * 360 / 16)) "$([ $s -lt 15 ] && echo ', ')"; done
  echo ']'
  echo 'bin_width_ms = 1.0'
  echo 'window_ms = 250.0'
  echo 'trials_per_stimulus = 20'
  echo 'gap_ms = [250.0, 450.0]'
  echo 'spontaneous_hz = 3.0'
  echo 'tick_rate_hz = 1000000.0'
  echo 'seed = 64016'
  fams=(poisson negative_binomial com_poisson)
  fanos=(1.0 1.4 0.6)
  for u in $(seq 0 63); do
    f=$((u % 3))
    echo "[[units]]"
    echo "id = $((1000 + u))"
    echo "preferred_deg = $((u * 360 / 64)).0"
    echo "baseline_count = 0.8"
    echo "peak_count = 4.0"
    echo "count_family = \"${fams[$f]}\""
    echo "fano = ${fanos[$f]}"
    echo "early_ms = $((20 + u % 15)).0"
    echo "late_ms = $((60 + u % 30)).0"
    echo "width_ms = 10.0"
  done
} > "$W/scenario.toml"
$BIN simulate --scenario "$W/scenario.toml" --out-dir "$W/d" >/dev/null
$BIN fit --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" -o "$W/m.apxm" --quiet 2>/dev/null
P=$((20000 + RANDOM % 20000))
$BIN daemon --model "$W/m.apxm" --ingest tcp://127.0.0.1:$P --publish tcp://127.0.0.1:$((P+1)) \
  --control tcp://127.0.0.1:$((P+2)) --task-ingest "" 2>"$W/daemon.log" &
DPID=$!
sleep 1
SESSION_S=$(awk -F, 'NR>1 {t=$2} END {print t+0.25}' "$W/d/trials.csv")
OUT=$($BIN replay --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" --to tcp://127.0.0.1:$P \
  --control tcp://127.0.0.1:$((P+2)) --fast 2>&1 | tail -1)
echo "$OUT"
SECS=$(echo "$OUT" | sed -E 's/.* in ([0-9.]+) s.*/\1/')
awk -v s="$SESSION_S" -v t="$SECS" 'BEGIN { printf "session %.1f s replayed in %.2f s: %.0f× real time\n", s, t, s/t }'
$BIN status --control tcp://127.0.0.1:$((P+2)) | grep -E "trials completed|update" || true
