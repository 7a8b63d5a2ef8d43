#!/usr/bin/env bash
# Firmware in the loop: the core's parse and step on emulated Cortex-M.
#
# For every target x configuration: quantize a model on the host, generate
# its Rust module (`lapwing codegen`) and a raw int16 input sequence, build
# examples/firmware for the target, run it under qemu-system-arm with
# instruction counting, and check that every output row is bit-for-bit the
# host's (`lapwing run --raw-input`). Measures emulated instructions per
# step, the stack high-water of one step, flash and RAM from the ELF; then
# the panic-free link proof per target (opt-level 3 and z, fat LTO).
#
# Writes target/firmware/measurements.json and measurements.md (also
# printed). Exit status 0 when everything passed, 1 when a check failed,
# 2 on a usage or setup error.
#
# Needs qemu-system-arm, binutils-arm-none-eabi and, for every target that
# `rustup target list --installed` lacks, Debian's rustc-web, cargo-web and
# rust-web-src (core is then built from source with -Zbuild-std=core).
# Run as root (CI), it first tries `rustup target add` for the missing
# targets (when rustup is there and can reach its server), then installs
# the missing packages with apt-get.
#
# The `demo` model is demo-data/model.safetensors, calibrated on and fed
# with demo-data/sample.csv; while that file does not exist, a synthetic
# model of the same shape (X=4, H=32, head Y=4) stands in.
#
# Environment: LAPWING_FW_STEPS (steps per run, default 2000, at least
# 1000), LAPWING_FW_TOOLCHAIN (auto: a rustup target where installed, else
# Debian's Rust; rustup or debian: that one for every target),
# LAPWING_FW_QEMU_TIMEOUT (seconds per QEMU run, default 600).
#
# Usage: bash tools/firmware/check.sh [--target T]... [--config C]...
#        [--no-proof] [--gen-only] [--list]
set -euo pipefail

ROOT=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
FW="$ROOT/examples/firmware"
GEN="$FW/gen"
OUT="$ROOT/target/firmware"
FW_TARGET="$OUT/cargo"          # the firmware's own cargo target directory
STEPS=${LAPWING_FW_STEPS:-2000} # >= 1,000 steps per run
QEMU_TIMEOUT=${LAPWING_FW_QEMU_TIMEOUT:-600}
TOOLCHAIN=${LAPWING_FW_TOOLCHAIN:-auto}
DEMO_MODEL="$ROOT/demo-data/model.safetensors"
DEMO_DATA="$ROOT/demo-data/sample.csv"

ALL_TARGETS=(thumbv6m-none-eabi thumbv7m-none-eabi thumbv7em-none-eabihf thumbv8m.main-none-eabihf)
# name | model | scheme | cell | activation table (standard when empty)
ALL_CONFIGS=(
    "example-w8a16-c16|example|w8a16|c16"
    "example-w8a8-c16|example|w8a8|c16"
    "example-w16a16-c16|example|w16a16|c16"
    "example-w8a16-c32|example|w8a16|c32"
    "demo-w8a16-c16|demo|w8a16|c16"
    "demo-w8a8-c16|demo|w8a8|c16"
    "demo-w16a16-c16|demo|w16a16|c16"
    "demo-w8a16-c16-compact|demo|w8a16|c16|compact"
    "deep-w8a8-c32|deep|w8a8|c32"
)

board() { # target -> "board cpu"
    case "$1" in
        thumbv6m-none-eabi) echo "microbit cortex-m0" ;;
        thumbv7m-none-eabi) echo "mps2-an385 cortex-m3" ;;
        thumbv7em-none-eabihf) echo "mps2-an386 cortex-m4" ;;
        thumbv8m.main-none-eabihf) echo "mps2-an505 cortex-m33" ;;
        *) return 1 ;;
    esac
}

model_files() { # model -> "safetensors calib data label"
    case "$1" in
        example) echo "$ROOT/examples/pipeline/lstm_x4_h16.safetensors $ROOT/examples/pipeline/signal.csv $ROOT/examples/pipeline/signal.csv example_X4_H16x2_Y2" ;;
        demo)
            if [ -f "$DEMO_MODEL" ]; then
                echo "$DEMO_MODEL $DEMO_DATA $DEMO_DATA demo_X4_H32_Y4"
            else
                echo "$GEN/shapes/demo/model.safetensors $GEN/shapes/demo/calib.csv $GEN/shapes/demo/signal.csv demo-shape_X4_H32_Y4_(synthetic)"
            fi
            ;;
        deep) echo "$GEN/shapes/deep/model.safetensors $GEN/shapes/deep/calib.csv $GEN/shapes/deep/signal.csv deep_X3_H5x3_no_head" ;;
        *) return 1 ;;
    esac
}

usage() {
    sed -n '2,/^set -euo/p' "${BASH_SOURCE[0]}" | sed '$d' | sed 's/^# \{0,1\}//'
    echo "Targets: ${ALL_TARGETS[*]}"
    echo "Configurations:"
    for c in "${ALL_CONFIGS[@]}"; do echo "  ${c%%|*}"; done
}

TARGETS=()
CONFIGS=()
PROOF=1
GEN_ONLY=0
while [ $# -gt 0 ]; do
    case "$1" in
        --target) TARGETS+=("${2:?--target needs a value}"); shift 2 ;;
        --config) CONFIGS+=("${2:?--config needs a value}"); shift 2 ;;
        --no-proof) PROOF=0; shift ;;
        --gen-only) GEN_ONLY=1; shift ;;
        --list) usage; exit 0 ;;
        -h|--help) usage; exit 0 ;;
        *) echo "check.sh: unknown argument \`$1\` (see --help)" >&2; exit 2 ;;
    esac
done
[ ${#TARGETS[@]} -gt 0 ] || TARGETS=("${ALL_TARGETS[@]}")
for t in "${TARGETS[@]}"; do
    board "$t" >/dev/null || { echo "check.sh: unknown target \`$t\` (one of: ${ALL_TARGETS[*]})" >&2; exit 2; }
done
case "$STEPS" in
    '' | *[!0-9]*) echo "check.sh: LAPWING_FW_STEPS=\`$STEPS\` is not a number" >&2; exit 2 ;;
esac
[ "$STEPS" -ge 1000 ] || { echo "check.sh: LAPWING_FW_STEPS must be at least 1000 (is $STEPS)" >&2; exit 2; }
case "$TOOLCHAIN" in
    auto | rustup | debian) ;;
    *) echo "check.sh: LAPWING_FW_TOOLCHAIN must be auto, rustup or debian (is \`$TOOLCHAIN\`)" >&2; exit 2 ;;
esac
SELECTED=()
if [ ${#CONFIGS[@]} -eq 0 ]; then
    SELECTED=("${ALL_CONFIGS[@]}")
else
    for want in "${CONFIGS[@]}"; do
        hit=""
        for c in "${ALL_CONFIGS[@]}"; do [ "${c%%|*}" = "$want" ] && hit="$c"; done
        [ -n "$hit" ] || { echo "check.sh: unknown configuration \`$want\` (see --list)" >&2; exit 2; }
        SELECTED+=("$hit")
    done
fi

START=$SECONDS
phase() { echo; echo "== $* ($((SECONDS - START)) s)"; }

# ------------------------------------------------------------------ setup
phase "setup: emulator, binutils, cross toolchain"
HOST_CARGO=$(command -v cargo || true)
[ -n "$HOST_CARGO" ] || { echo "check.sh: cargo not found (the host tool builds with the machine's Rust)" >&2; exit 2; }

IS_ROOT=0
[ "$(id -u)" -eq 0 ] && IS_ROOT=1
HAVE_RUSTUP=0
command -v rustup >/dev/null 2>&1 && HAVE_RUSTUP=1
# Asked from the firmware's directory: the toolchain cargo uses there.
rustup_installed() { [ $HAVE_RUSTUP -eq 1 ] && (cd "$FW" && rustup target list --installed 2>/dev/null) || true; }

installed_targets=""
if [ "$TOOLCHAIN" != debian ]; then
    installed_targets=$(rustup_installed)
    # As root (CI), fetch the missing standard libraries with rustup; when
    # it cannot (offline, no rustup), Debian's Rust builds core instead.
    if [ $IS_ROOT -eq 1 ] && [ $HAVE_RUSTUP -eq 1 ]; then
        mkdir -p "$OUT/logs"
        for t in "${TARGETS[@]}"; do
            grep -qx "$t" <<<"$installed_targets" && continue
            if (cd "$FW" && timeout 300 rustup target add "$t") >"$OUT/logs/rustup-$t.log" 2>&1; then
                echo "rustup target add $t: done"
            else
                echo "rustup target add $t: failed ($(grep -m 1 '^error' "$OUT/logs/rustup-$t.log" || echo "see ${OUT#"$ROOT"/}/logs/rustup-$t.log")); using Debian's Rust for it"
            fi
        done
        installed_targets=$(rustup_installed)
    fi
fi
declare -A MODE
need_debian_rust=0
for t in "${TARGETS[@]}"; do
    if [ "$TOOLCHAIN" != debian ] && grep -qx "$t" <<<"$installed_targets"; then
        MODE[$t]=rustup
    elif [ "$TOOLCHAIN" = rustup ]; then
        echo "check.sh: LAPWING_FW_TOOLCHAIN=rustup but rustup has no $t (rustup target add $t)" >&2
        exit 2
    else
        MODE[$t]=debian
        need_debian_rust=1
    fi
done

debian_rust_ok() {
    [ -x /usr/bin/cargo ] && [ -x /usr/bin/rustc ] && [ -d /usr/lib/rustlib/src/rust/library/core ] || return 1
    # Debian's rustc-web is recent; bookworm's plain `rustc` (1.63) is too old for the core.
    local minor
    minor=$(/usr/bin/rustc --version | sed -n 's/^rustc 1\.\([0-9]*\).*/\1/p')
    [ -n "$minor" ] && [ "$minor" -ge 85 ]
}

missing=()
command -v qemu-system-arm >/dev/null 2>&1 || missing+=(qemu-system-arm)
for tool in ld size objdump addr2line; do
    command -v "arm-none-eabi-$tool" >/dev/null 2>&1 || { missing+=(binutils-arm-none-eabi); break; }
done
if [ $need_debian_rust -eq 1 ] && ! debian_rust_ok; then
    missing+=(rustc-web cargo-web rust-web-src)
fi
if [ ${#missing[@]} -gt 0 ]; then
    if [ $IS_ROOT -eq 1 ]; then
        echo "installing: ${missing[*]}"
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq
        apt-get install -y -qq "${missing[@]}" >/dev/null
    else
        echo "check.sh: missing packages: ${missing[*]}" >&2
        echo "  install them as root:  apt-get install -y ${missing[*]}" >&2
        echo "  (or give rustup the targets, if it can download them: rustup target add ${TARGETS[*]})" >&2
        exit 2
    fi
fi
if [ $need_debian_rust -eq 1 ] && ! debian_rust_ok; then
    echo "check.sh: /usr/bin/rustc is missing, older than 1.85 or has no library sources (rust-web-src)" >&2
    exit 2
fi
qemu-system-arm --version | head -n 1
declare -A RUSTC_OF
for t in "${TARGETS[@]}"; do
    if [ "${MODE[$t]}" = rustup ]; then
        RUSTC_OF[$t]="$(cd "$FW" && rustc --version | cut -d' ' -f1-2) (rustup target)"
    else
        RUSTC_OF[$t]="$(/usr/bin/rustc --version | cut -d' ' -f1-2) (Debian, -Zbuild-std=core)"
    fi
    echo "$t: ${RUSTC_OF[$t]}"
done

# The M33 build targets the Cortex-M33 core, whose DSP extension gives the
# dual 16-bit multiply-accumulates (smlad/smlald) the int16 dot products
# use; the plain thumbv8m.main target assumes a core without it. This is
# cargo's per-target setting as an environment variable: a
# `[target.thumbv8m.main-none-eabihf]` table is not found by cargo's config
# lookup (the dot in the triple), so .cargo/config.toml cannot hold it.
M33_RUSTFLAGS="-C target-cpu=cortex-m33"

# Runs cargo for the firmware crate (from its directory, so its
# .cargo/config.toml applies), with the toolchain that serves target $1.
fw_cargo() {
    local t=$1
    shift
    if [ "${MODE[$t]}" = rustup ]; then
        (cd "$FW" && env -u RUSTFLAGS -u CARGO_ENCODED_RUSTFLAGS -u CARGO_BUILD_TARGET \
            CARGO_TARGET_THUMBV8M_MAIN_NONE_EABIHF_RUSTFLAGS="$M33_RUSTFLAGS" \
            CARGO_TARGET_DIR="$FW_TARGET" "$HOST_CARGO" "$@" --locked --target "$t")
    else
        (cd "$FW" && env -u RUSTFLAGS -u CARGO_ENCODED_RUSTFLAGS -u CARGO_BUILD_TARGET -u RUSTUP_TOOLCHAIN \
            CARGO_TARGET_THUMBV8M_MAIN_NONE_EABIHF_RUSTFLAGS="$M33_RUSTFLAGS" \
            RUSTC_BOOTSTRAP=1 RUSTC=/usr/bin/rustc PATH="/usr/bin:$PATH" CARGO_TARGET_DIR="$FW_TARGET" \
            /usr/bin/cargo "$@" --locked -Zbuild-std=core --target "$t")
    fi
}

qemu_run() { # target elf log -> QEMU's exit status
    local b cpu
    read -r b cpu <<<"$(board "$1")"
    local cpuarg=(-cpu "$cpu")
    [ "$b" = microbit ] && cpuarg=() # the machine fixes its CPU
    timeout "$QEMU_TIMEOUT" qemu-system-arm -machine "$b" "${cpuarg[@]}" -display none -monitor none -serial null \
        -semihosting-config enable=on,target=native -icount shift=0 -kernel "$2" >"$3" 2>&1 </dev/null
}

size_of() { arm-none-eabi-size "$1" | awk 'NR == 2 { print $1, $2, $3 }'; }

# ------------------------------------------------------------------ host side
phase "host: build lapwing and the helper"
(cd "$ROOT" && "$HOST_CARGO" build --release --locked -q -p lapwing-tools --bin lapwing --example firmware_loop)
HOST_TARGET=${CARGO_TARGET_DIR:-$ROOT/target}
case "$HOST_TARGET" in /*) ;; *) HOST_TARGET="$ROOT/$HOST_TARGET" ;; esac
LAPWING="$HOST_TARGET/release/lapwing"
HELPER="$HOST_TARGET/release/examples/firmware_loop"

phase "host: models, blobs, modules, inputs, host outputs ($STEPS steps each)"
mkdir -p "$GEN" "$OUT/records" "$OUT/logs" "$OUT/elf"
rm -f "$OUT"/records/*.json "$OUT/measurements.json" "$OUT/measurements.md"
for model in demo deep; do
    for c in "${SELECTED[@]}"; do
        IFS='|' read -r _ m _ _ <<<"$c"
        [ "$m" = "$model" ] || continue
        if [ "$model" = demo ] && [ -f "$DEMO_MODEL" ]; then
            echo "demo: ${DEMO_MODEL#"$ROOT"/}, calibrated on and fed with ${DEMO_DATA#"$ROOT"/}"
        else
            [ "$model" = demo ] && echo "demo: ${DEMO_MODEL#"$ROOT"/} does not exist; a synthetic model of its shape stands in"
            "$HELPER" shape "$model" "$GEN/shapes/$model"
        fi
        break
    done
done
for c in "${SELECTED[@]}"; do
    IFS='|' read -r name model scheme cell table <<<"$c"
    read -r st calib data _ <<<"$(model_files "$model")"
    d="$GEN/$name"
    mkdir -p "$d"
    "$LAPWING" quantize "$st" --calib "$calib" --scheme "$scheme" --cell "$cell" --table "${table:-standard}" \
        -o "$d/model.lwq" >"$d/quantize.txt"
    "$LAPWING" codegen "$d/model.lwq" -o "$d/model.rs" >/dev/null
    "$HELPER" inputs "$d/model.lwq" "$data" --steps "$STEPS" --config "$name" --dir "$d"
    "$LAPWING" run "$d/model.lwq" --data "$d/inputs.csv" -o "$d/host.csv" --raw-input >/dev/null
    echo "$name: $(tail -n 1 "$d/quantize.txt" | sed 's/^wrote [^:]*: //')"
done

install_config() { # name: make it the configuration the firmware builds
    cmp -s "$GEN/$1/model.rs" "$GEN/model.rs" 2>/dev/null || cp "$GEN/$1/model.rs" "$GEN/model.rs"
    cmp -s "$GEN/$1/inputs.rs" "$GEN/inputs.rs" 2>/dev/null || cp "$GEN/$1/inputs.rs" "$GEN/inputs.rs"
}

if [ $GEN_ONLY -eq 1 ]; then
    first=${SELECTED[0]%%|*}
    install_config "$first"
    echo "generated under $GEN; $first is installed as gen/model.rs and gen/inputs.rs"
    echo "build and run it: cd examples/firmware && cargo run --release --bin run --target thumbv7em-none-eabihf"
    exit 0
fi

# ------------------------------------------------------------------ firmware
FAIL=()
order=0
for t in "${TARGETS[@]}"; do
    read -r b cpu <<<"$(board "$t")"
    mkdir -p "$OUT/elf/$t" "$OUT/logs/$t"
    phase "$t on QEMU $b ($cpu)"
    order=0
    for c in "${SELECTED[@]}"; do
        IFS='|' read -r name model scheme cell table <<<"$c"
        order=$((order + 1))
        read -r st _ _ label <<<"$(model_files "$model")"
        [ -n "$table" ] && [ "$table" != standard ] && label="${label}_(${table}_table)"
        install_config "$name"
        echo "-- $name"
        log="$OUT/logs/$t/$name.log"
        if ! fw_cargo "$t" build --release -q --bin run >"$log.build" 2>&1; then
            cat "$log.build"
            FAIL+=("$t $name: build failed")
            continue
        fi
        cp "$FW_TARGET/$t/release/run" "$OUT/elf/$t/$name.elf"
        # The minimal firmware: parse and step only, no printing (the proof
        # program with a defined panic handler); its size is the footprint
        # of the core plus the blob.
        min_size=()
        if fw_cargo "$t" build --release -q --bin proof --features diagnose >"$log.min.build" 2>&1; then
            cp "$FW_TARGET/$t/release/proof" "$OUT/elf/$t/$name.min.elf"
            min_size=(--min-size "$(size_of "$OUT/elf/$t/$name.min.elf")")
            if ! qemu_run "$t" "$OUT/elf/$t/$name.min.elf" "$log.min"; then
                FAIL+=("$t $name: the minimal firmware failed (parse or step returned an error)")
            fi
        else
            cat "$log.min.build"
            FAIL+=("$t $name: minimal build failed")
        fi
        status=0
        qemu_run "$t" "$OUT/elf/$t/$name.elf" "$log" || status=$?
        [ $status -eq 0 ] || echo "    QEMU exited with status $status"
        if ! "$HELPER" record --log "$log" --host "$GEN/$name/host.csv" \
            --size "$(size_of "$OUT/elf/$t/$name.elf")" "${min_size[@]}" \
            --meta "config=$name" --meta "model=${label//_/ }" --meta "scheme=$scheme" --meta "cell=$cell" \
            --meta "table=${table:-standard}" \
            --meta "order=$order" --meta "command=bash tools/firmware/check.sh --target $t --config $name" \
            --meta "rustc=${RUSTC_OF[$t]}" --meta "model_file=${st#"$ROOT"/}" \
            --out "$OUT/records/$t.$name.json" || [ $status -ne 0 ]; then
            FAIL+=("$t $name: outputs or measurements failed (log: ${log#"$ROOT"/})")
        fi
    done

    [ $PROOF -eq 1 ] || continue
    # The panic-free link proof, on the last configuration's blob (the blob
    # is opaque to the optimiser, so every scheme stays reachable).
    for profile in release release-z; do
        level=3
        [ $profile = release-z ] && level=z
        desc="fat LTO, opt-level $level"
        plog="$OUT/logs/$t/proof-$profile"
        elf="$FW_TARGET/$t/$profile/proof"
        linked=false
        extra=()
        if fw_cargo "$t" build --profile "$profile" -q --bin proof >"$plog.build" 2>&1; then
            linked=true
            cp "$elf" "$OUT/elf/$t/proof-$profile.elf"
            ran=false
            qemu_run "$t" "$elf" "$plog.run" && ran=true
            [ $ran = true ] || FAIL+=("$t: the proof firmware ($desc) did not exit 0")
            extra+=(--ran "$ran" --size "$(size_of "$elf")")
            echo "proof ($desc): links, so no panic path remains in parse or step; ran: $ran"
            # Negative control: a deliberate panic path must fail the link.
            if [ $profile = release ]; then
                if fw_cargo "$t" build --profile "$profile" -q --bin proof --features canary \
                    >"$plog.canary.build" 2>&1; then
                    extra+=(--canary-refused false)
                    FAIL+=("$t: the canary (a deliberate panic) linked: the proof cannot see panics")
                else
                    extra+=(--canary-refused true)
                fi
            fi
        elif grep -q "undefined reference to .lapwing_panic_path_exists" "$plog.build"; then
            echo "proof ($desc): FAILED, panic paths remain (core source line: the call that can panic):"
            if fw_cargo "$t" build --profile "$profile" -q --bin proof --features diagnose \
                >"$plog.diag.build" 2>&1; then
                "$HELPER" panic-sites "$elf" --src "$ROOT/src" >"$plog.sites" || true
                extra+=(--sites "$plog.sites" --size "$(size_of "$elf")")
            else
                echo "(the diagnosis build failed too: ${plog#"$ROOT"/}.diag.build)" >"$plog.sites"
            fi
            sed 's/^/    /' "$plog.sites"
            FAIL+=("$t: panic-free proof ($desc) failed")
        else
            cat "$plog.build"
            FAIL+=("$t: proof build ($desc) failed for another reason")
        fi
        "$HELPER" proof --target "$t" --profile "$desc" --linked "$linked" "${extra[@]}" \
            --out "$OUT/records/$t.proof-$profile.json"
    done
done

# ------------------------------------------------------------------ summary
phase "summary"
"$HELPER" summary --json "$OUT/measurements.json" --markdown "$OUT/measurements.md" --steps "$STEPS" \
    "$OUT"/records/*.json
{
    echo
    echo "Compilers: $(for t in "${TARGETS[@]}"; do echo "$t ${RUSTC_OF[$t]}"; done | paste -sd ';' | sed 's/;/; /g')."
    echo "QEMU: $(qemu-system-arm --version | head -n 1 | sed 's/^QEMU emulator version //')."
} | tee -a "$OUT/measurements.md"
echo
echo "wrote ${OUT#"$ROOT"/}/measurements.json and measurements.md ($((SECONDS - START)) s)"
if [ ${#FAIL[@]} -gt 0 ]; then
    echo "FAILED:"
    printf '  %s\n' "${FAIL[@]}"
    exit 1
fi
echo "all checks passed"
