#!/bin/sh
# A short fuzzing run of every target, for CI: builds the targets once, then runs each
# for SECONDS (default 20) from the committed seeds. New corpus entries go to a
# temporary directory, so the committed corpus stays as it is; a crash, a hang past 10 s
# or more than 2 GiB of memory fails the script, and the input that did it is kept
# under fuzz/artifacts/TARGET/.
#
# Needs cargo-fuzz (`cargo install cargo-fuzz`); works on the stable toolchain through
# RUSTC_BOOTSTRAP=1 (cargo fuzz needs -Z flags).
set -eu
cd "$(dirname "$0")"
SECONDS_EACH="${1:-20}"
TARGETS="campaign_file npy result_json external_reply flow_weights"
# Pin the dependency versions to the workspace's own lock file.
[ -f Cargo.lock ] || cp ../Cargo.lock Cargo.lock
RUSTC_BOOTSTRAP=1 cargo fuzz build
BIN="${CARGO_TARGET_DIR:-target}/$(rustc -vV | sed -n 's/^host: //p')/release"
SCRATCH="$(mktemp -d)"
trap 'rm -rf "$SCRATCH"' EXIT
failed=""
for t in $TARGETS; do
    mkdir -p "$SCRATCH/$t" "artifacts/$t"
    echo "== $t: ${SECONDS_EACH} s"
    if ! "$BIN/$t" "$SCRATCH/$t" "corpus/$t" \
        -max_total_time="$SECONDS_EACH" -rss_limit_mb=2048 -timeout=10 \
        -artifact_prefix="artifacts/$t/" -print_final_stats=1 2>"$SCRATCH/$t.log"; then
        tail -n 40 "$SCRATCH/$t.log"
        failed="$failed $t"
    else
        grep -E '^stat::(number_of_executed_units|average_exec_per_sec)' "$SCRATCH/$t.log" || true
    fi
done
if [ -n "$failed" ]; then
    echo "fuzz smoke run failed:$failed (inputs under fuzz/artifacts/)" >&2
    exit 1
fi
echo "fuzz smoke run: every target ran ${SECONDS_EACH} s without a crash"
