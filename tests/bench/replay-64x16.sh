#!/usr/bin/env bash
# Replay throughput at 64 units × 16 stimuli: writes a scenario (one third each Poisson,
# negative binomial and COM-Poisson units), simulates 20 trials per stimulus, fits, starts a
# daemon on loopback and replays the session with `--fast` (ending with the daemon's
# acknowledgement of the last message), then prints the peak resident memory of the replaying
# client and of the daemon. Usage: tests/bench/replay-64x16.sh after a release build.
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
W=$(mktemp -d)
trap 'kill $DPID 2>/dev/null || true; rm -rf "$W"' EXIT
tests/bench/scenario.sh 64 16 20 64016 > "$W/scenario.toml"
$BIN simulate --scenario "$W/scenario.toml" --out-dir "$W/d" >/dev/null
$BIN fit --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" -o "$W/m.apxm" --quiet 2>/dev/null
P=$((20000 + RANDOM % 20000))
$BIN daemon --model "$W/m.apxm" --ingest tcp://127.0.0.1:$P --publish tcp://127.0.0.1:$((P+1)) \
  --control tcp://127.0.0.1:$((P+2)) --task-ingest "" 2>"$W/daemon.log" &
DPID=$!
sleep 1
SESSION_S=$(awk -F, 'NR>1 {t=$2} END {print t+0.25}' "$W/d/trials.csv")
OUT=$(/usr/bin/time -f "replay client: %M kB peak resident" -o "$W/client.mem" \
  $BIN replay --spikes "$W/d/spikes.csv" --trials "$W/d/trials.csv" --to tcp://127.0.0.1:$P \
  --control tcp://127.0.0.1:$((P+2)) --fast 2>&1 | tail -1)
echo "$OUT"
cat "$W/client.mem"
echo "daemon: $(awk '/VmHWM/ {print $2, $3}' /proc/$DPID/status) peak resident"
SECS=$(echo "$OUT" | sed -E 's/.* in ([0-9.]+) s.*/\1/')
awk -v s="$SESSION_S" -v t="$SECS" 'BEGIN { printf "session %.1f s replayed in %.2f s: %.0f× real time\n", s, t, s/t }'
$BIN status --control tcp://127.0.0.1:$((P+2)) | grep -E "trials completed|update" || true
