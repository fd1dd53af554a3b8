#!/usr/bin/env bash
# Run each fuzz target for SECONDS (default 600), one after the other, on one core.
#   fuzz/run.sh [SECONDS] [TARGET...]
# Needs cargo-fuzz (`cargo install cargo-fuzz`). The stable toolchain is used with
# RUSTC_BOOTSTRAP=1 for the unstable flags libFuzzer builds need. Seeds the corpus first.
# A run's last status line (executions, coverage, features) is kept in fuzz/logs/TARGET.log.
set -euo pipefail
cd "$(dirname "$0")"
secs="${1:-600}"
shift || true
targets=("$@")
if [ ${#targets[@]} -eq 0 ]; then
    targets=(patch_text patch_set wav_load)
fi
./seed.sh
mkdir -p logs
export RUSTC_BOOTSTRAP=1
for t in "${targets[@]}"; do
    echo "== $t for ${secs}s"
    # -s none: safe Rust needs no address sanitizer; -a keeps debug assertions (overflow
    # checks) on, so an arithmetic overflow is found as a crash.
    cargo fuzz run -s none -a "$t" "corpus/$t" -- \
        -max_total_time="$secs" -jobs=1 -workers=1 -max_len=8192 -rss_limit_mb=2048 \
        -timeout=10 -print_final_stats=1 > "logs/$t.run.log" 2>&1 || true
    # with -jobs=1 libFuzzer runs one worker that logs to fuzz-0.log
    if [ -f fuzz-0.log ]; then mv fuzz-0.log "logs/$t.log"; fi
    grep -E '^#[0-9]+ +DONE|^stat::|panicked|ERROR|SUMMARY' "logs/$t.log" || true
done
if [ -n "$(find artifacts -type f 2>/dev/null)" ]; then
    find artifacts -type f
    echo "crash inputs above: fix them and add each to the catalogue"
else
    echo "no crash inputs"
fi
