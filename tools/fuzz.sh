#!/usr/bin/env bash
# Fuzzing (cargo-fuzz, libFuzzer, nightly): runs every target of fuzz/ for a
# bounded time, LAPWING_FUZZ_SECONDS each (default 60), from the seed corpus
# (fuzz/seeds.sh) plus the committed regression inputs (fuzz/regressions/).
# Skips with a plain message when there is no nightly toolchain or no
# cargo-fuzz (installing cargo-fuzz from crates.io first when run as root).
# Exits 1 when a target crashes; the input is left in fuzz/artifacts/TARGET/.
# Usage: bash tools/fuzz.sh [TARGET...]   (LAPWING_FUZZ_SECONDS=600 for longer)
set -euo pipefail
cd "$(dirname "$0")/.."
secs=${LAPWING_FUZZ_SECONDS:-60}
all=(blob_step import_safetensors import_onnx import_npz data_csv data_npy config_toml)
targets=("$@")
[ ${#targets[@]} -eq 0 ] && targets=("${all[@]}")

if ! cargo +nightly --version >/dev/null 2>&1; then
    echo "fuzz: no nightly toolchain on this machine (cargo +nightly): fuzzing skipped (the property tests still ran)"
    exit 0
fi
if ! cargo +nightly fuzz --version >/dev/null 2>&1; then
    if [ "$(id -u)" = 0 ]; then
        echo "fuzz: installing cargo-fuzz from crates.io"
        if ! cargo install --locked cargo-fuzz >/dev/null 2>&1; then
            echo "fuzz: cargo-fuzz could not be installed (no network to crates.io?): fuzzing skipped"
            exit 0
        fi
    else
        echo "fuzz: cargo-fuzz is not installed (cargo install cargo-fuzz): fuzzing skipped"
        exit 0
    fi
fi
cargo +nightly --version
cargo +nightly fuzz --version

if [ ! -d fuzz/corpus/blob_step ]; then
    echo "== fuzz: seed corpus"
    bash fuzz/seeds.sh
fi

echo "== fuzz: build (address sanitizer, release with debug assertions)"
cargo +nightly fuzz build -O -a

failed=()
for t in "${targets[@]}"; do
    mkdir -p "fuzz/corpus/$t" "fuzz/regressions/$t"
    log=$(mktemp)
    # One process, no forking; a 20 s per-input timeout and a 2 GiB RSS
    # limit turn hangs and runaway allocations into failures too.
    if nice cargo +nightly fuzz run -O -a "$t" "fuzz/corpus/$t" "fuzz/regressions/$t" -- \
        -max_total_time="$secs" -timeout=20 -rss_limit_mb=2048 -print_final_stats=1 >"$log" 2>&1; then
        runs=$(grep -o 'Done [0-9]* runs in [0-9]* second' "$log" | tail -1 || true)
        echo "fuzz: $t: ok, ${runs:-finished} (corpus $(ls "fuzz/corpus/$t" | wc -l) inputs)"
    else
        echo "fuzz: $t: FAILED; last lines of libFuzzer's log:"
        tail -n 40 "$log"
        failed+=("$t")
    fi
    rm -f "$log"
done

if [ ${#failed[@]} -gt 0 ]; then
    echo "fuzz: crashes in ${failed[*]}: inputs in fuzz/artifacts/; reproduce with cargo +nightly fuzz run TARGET FILE"
    exit 1
fi
echo "fuzz: ${#targets[@]} targets, ${secs} s each, no crash"
