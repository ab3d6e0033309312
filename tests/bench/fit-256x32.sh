#!/usr/bin/env bash
# Fit time and peak memory at 256 units × 32 stimuli × 50 trials per stimulus (the issue's
# size): writes a scenario (Poisson, negative binomial and COM-Poisson units in turn),
# simulates, then fits with every family allowed. Usage: tests/bench/fit-256x32.sh.
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
W=$(mktemp -d)
trap 'rm -rf "$W"' EXIT
{
  echo 'description = "fit benchmark, 256 units x 32 stimuli"'
  printf 'stimuli = ['
  for s in $(seq 0 31); do printf '["d%d", %d.0]%s' $s $((s * 360 / 32)) "$([ $s -lt 31 ] && echo ', ')"; done
  echo ']'
  echo 'bin_width_ms = 1.0'
  echo 'window_ms = 250.0'
  echo 'trials_per_stimulus = 50'
  echo 'gap_ms = [250.0, 450.0]'
  echo 'spontaneous_hz = 3.0'
  echo 'tick_rate_hz = 1000000.0'
  echo 'seed = 256032'
  fams=(poisson negative_binomial com_poisson)
  fanos=(1.0 1.4 0.6)
  for u in $(seq 0 255); do
    f=$((u % 3))
    echo "[[units]]"
    echo "id = $((1000 + u))"
    echo "preferred_deg = $((u * 360 / 256)).0"
    echo "baseline_count = 0.8"
    echo "peak_count = 4.0"
    echo "count_family = \"${fams[$f]}\""
    echo "fano = ${fanos[$f]}"
    echo "early_ms = $((20 + u % 15)).0"
    echo "late_ms = $((60 + u % 30)).0"
    echo "width_ms = 10.0"
  done
} > "$W/scenario.toml"
$BIN simulate --scenario "$W/scenario.toml" --out-dir "$W/d" | tail -1
/usr/bin/time -f "fit: %e s wall, %M kB peak resident" $BIN fit --spikes "$W/d/spikes.csv" \
  --trials "$W/d/trials.csv" -o "$W/m.apxm" --quiet 2>&1 | tail -2
