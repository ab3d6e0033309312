#!/usr/bin/env bash
# Runs every fuzz target (or those named) for SECONDS each, one after another, with overflow
# checks and debug assertions on, a 10 s timeout per input and a 2 GB memory limit, and prints
# the executions of each. Needs a nightly toolchain and cargo-fuzz (`cargo install cargo-fuzz`).
#   tests/fuzz/run.sh 600                 # every target, 10 minutes each
#   tests/fuzz/run.sh 900 inbound engine_ops
# Findings are written to tests/fuzz/artifacts/<target>/; minimise one with
#   cargo +nightly fuzz tmin --fuzz-dir fuzz -s none -a <target> <file>   (from tests/)
# and keep it in tests/fuzz/regressions/<target>/ so `cargo test` replays it on stable.
set -uo pipefail
seconds=${1:-600}
shift || true
cd "$(dirname "$0")/.."
targets=("$@")
if [ ${#targets[@]} -eq 0 ]; then
  targets=(inbound engine_ops model_file session_file csv_tables toml_config scenario monitor shard_link declared_sizes nwb_file)
fi
cargo +nightly fuzz build --fuzz-dir fuzz -s none -a >/dev/null || exit 1
status=0
for t in "${targets[@]}"; do
  mkdir -p "fuzz/corpus/$t" "fuzz/logs"
  log="fuzz/logs/$t.log"
  # declared_sizes runs under a 64 MB memory budget: any single allocation past 96 MB, or a
  # process past 512 MB, is a size the budget checks let through.
  limits=(-rss_limit_mb=2048)
  [ "$t" = declared_sizes ] && limits=(-rss_limit_mb=512 -malloc_limit_mb=96)
  # nwb_file: whole HDF5 files (its seeds are up to 51 KB), under the reader's default budget.
  [ "$t" = nwb_file ] && limits=(-rss_limit_mb=3072 -malloc_limit_mb=2200 -max_len=65536)
  cargo +nightly fuzz run --fuzz-dir fuzz -s none -a "$t" "fuzz/corpus/$t" "fuzz/seeds/$t" -- \
    -max_total_time="$seconds" -timeout=10 "${limits[@]}" -print_final_stats=1 >"$log" 2>&1
  rc=$?
  execs=$(grep -o 'stat::number_of_executed_units: *[0-9]*' "$log" | grep -o '[0-9]*$' | tail -1)
  cov=$(grep -o 'cov: [0-9]*' "$log" | tail -1)
  if [ $rc -eq 0 ]; then
    echo "$t: ${execs:-?} executions in ${seconds} s, ${cov:-cov ?}, no crash, timeout or out-of-memory"
  else
    echo "$t: FAILED (exit $rc) after ${execs:-?} executions; see tests/$log and tests/fuzz/artifacts/$t/"
    status=1
  fi
done
exit $status
