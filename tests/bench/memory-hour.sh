#!/usr/bin/env bash
# Memory over a long session: replays one hour of simulated recording (the demo scenario with
# 750 trials per stimulus, 6000 trials) into a daemon as fast as it accepts, sampling the
# daemon's resident memory every 0.2 s. Prints RSS after one minute of session time and at the
# end. Usage: tests/bench/memory-hour.sh [SPEED] (after `cargo build --release`); SPEED is
# the replay's times-real-time (default 60, an hour in a minute; `fast` for as fast as it goes,
# where the inbound queue's high-water mark, not the session length, sets the memory).
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
W=$(mktemp -d)
trap 'kill $DPID 2>/dev/null || true; rm -rf "$W"' EXIT
$BIN simulate --scenario demo-data/scenario.toml --out-dir "$W/hour" --trials 750 --seed 7 >/dev/null
$BIN fit --spikes demo-data/spikes.csv --trials demo-data/trials.csv -o "$W/m.apxm" --quiet 2>/dev/null
P=$((20000 + RANDOM % 20000))
$BIN daemon --model "$W/m.apxm" --ingest tcp://127.0.0.1:$P --publish tcp://127.0.0.1:$((P+1)) \
  --control tcp://127.0.0.1:$((P+2)) --task-ingest "" --record "$W/s.apxs" 2>"$W/daemon.log" &
DPID=$!
sleep 1
( while kill -0 $DPID 2>/dev/null; do
    echo "$(date +%s.%N) $(awk '/VmRSS/ {print $2}' /proc/$DPID/status)"; sleep 0.2; done ) > "$W/rss.txt" &
T0=$(date +%s.%N)
SPEED=${1:-60}
if [ "$SPEED" = fast ]; then PACE=(--fast); else PACE=(--speed "$SPEED"); fi
$BIN replay --spikes "$W/hour/spikes.csv" --trials "$W/hour/trials.csv" --to tcp://127.0.0.1:$P \
  --control tcp://127.0.0.1:$((P+2)) "${PACE[@]}" 2>&1 | tail -1
T1=$(date +%s.%N)
SESSION_S=$(awk -F, 'NR>1 {t=$2} END {print t+0.25}' "$W/hour/trials.csv")
sleep 0.5
kill -TERM $DPID; wait $DPID || true
awk -v t0="$T0" -v t1="$T1" -v sess="$SESSION_S" '
  { t=$1-t0; if (t>=0) { r[NR]=$2; tt[NR]=t } }
  END {
    minute = (t1-t0) * 60 / sess;   # wall time at which one minute of session had replayed
    for (i in r) { if (tt[i] >= minute && (first=="" || tt[i] < ft)) { first=r[i]; ft=tt[i] } if (tt[i] <= t1-t0 && tt[i] > lt) { last=r[i]; lt=tt[i] } }
    printf "session %.0f s replayed in %.1f s (%.0f× real time)\n", sess, t1-t0, sess/(t1-t0);
    printf "daemon RSS after 1 min of session: %d kB; at the end: %d kB (%+.1f%%)\n", first, last, 100*(last-first)/first;
    for (m = 10; m <= 50; m += 20) { w = (t1-t0) * m * 60 / sess; best=""; for (i in r) if (tt[i] >= w && (best=="" || tt[i] < bt)) { best=r[i]; bt=tt[i] } printf "  after %d min: %d kB\n", m, best }
  }' "$W/rss.txt"
