#!/usr/bin/env bash
# Prints a benchmark scenario (TOML) for the simulator: UNITS units × STIMULI stimuli, TRIALS
# trials per stimulus, SEED; units take Poisson, negative binomial and COM-Poisson counts in turn.
# Usage: tests/bench/scenario.sh UNITS STIMULI TRIALS SEED > scenario.toml
set -euo pipefail
NU=$1 NS=$2 TRIALS=$3 SEED=$4
echo "description = \"benchmark, $NU units x $NS stimuli\""
printf 'stimuli = ['
for s in $(seq 0 $((NS - 1))); do printf '["d%d", %d.0]%s' $s $((s * 360 / NS)) "$([ $s -lt $((NS - 1)) ] && echo ', ')"; done
echo ']'
echo 'bin_width_ms = 1.0'
echo 'window_ms = 250.0'
echo "trials_per_stimulus = $TRIALS"
echo 'gap_ms = [250.0, 450.0]'
echo 'spontaneous_hz = 3.0'
echo 'tick_rate_hz = 1000000.0'
echo "seed = $SEED"
fams=(poisson negative_binomial com_poisson)
fanos=(1.0 1.4 0.6)
for u in $(seq 0 $((NU - 1))); do
  f=$((u % 3))
  echo "[[units]]"
  echo "id = $((1000 + u))"
  echo "preferred_deg = $((u * 360 / NU)).0"
  echo "baseline_count = 0.8"
  echo "peak_count = 4.0"
  echo "count_family = \"${fams[$f]}\""
  echo "fano = ${fanos[$f]}"
  echo "early_ms = $((20 + u % 15)).0"
  echo "late_ms = $((60 + u % 30)).0"
  echo "width_ms = 10.0"
done
