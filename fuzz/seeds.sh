#!/usr/bin/env bash
# Writes the seed corpus of every fuzz target into fuzz/corpus/TARGET/ from
# valid files: blobs of every scheme, cell and table (and one with a
# detector) quantized by the release `lapwing` binary from a tiny fitted
# model, the shipped float models (safetensors, npz), small CSV and .npy data
# files, and the shipped TOML files. Nothing here is committed (corpus/ is
# ignored); fuzz/regressions/ holds the few committed inputs.
# Usage: bash fuzz/seeds.sh   (from anywhere; needs cargo)
set -euo pipefail
cd "$(dirname "$0")/.."
corpus=fuzz/corpus
mkdir -p "$corpus"/{blob_step,import_safetensors,import_onnx,import_npz,data_csv,data_npy,config_toml}

cargo build --release --locked -q -p lapwing-tools --bin lapwing
lw=target/release/lapwing
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

# A short normal-running set and a tiny next-step predictor fitted on it
# (X4 H4, one epoch): small seeds keep the fuzzer fast.
"$lw" simulate demo-data/scenario.toml --set sample -o "$tmp/sample.csv" >/dev/null
head -n 301 "$tmp/sample.csv" >"$tmp/short.csv"
"$lw" fit --train "$tmp/short.csv" -o "$tmp/tiny.safetensors" --hidden 4 --epochs 1 --window 16 --batch 2 >/dev/null
cp "$tmp/tiny.safetensors" "$corpus/import_safetensors/tiny_lapwing_norm.safetensors"
# ONNX: the reference models (accepted and refused) of the import tests.
cp tests/data/onnx/*.onnx tests/data/onnx/refused/*.onnx "$corpus/import_onnx/"

# Blobs: every scheme x cell x table from the tiny model, one with a detector.
for scheme in w8a16 w8a8 w16a16; do
    for cell in c16 c32; do
        for table in standard compact; do
            "$lw" quantize "$tmp/tiny.safetensors" --calib "$tmp/short.csv" --scheme "$scheme" --cell "$cell" \
                --table "$table" -o "$corpus/blob_step/tiny_${scheme}_${cell}_${table}.lwq" >/dev/null
        done
    done
done
"$lw" quantize "$tmp/tiny.safetensors" --calib "$tmp/short.csv" --detector \
    -o "$corpus/blob_step/tiny_detector.lwq" >/dev/null
# The shipped two-layer example, quantized as the README does.
"$lw" quantize examples/pipeline/lstm_x4_h16.safetensors --calib examples/pipeline/signal.csv \
    -o "$corpus/blob_step/example_w8a16.lwq" >/dev/null

# Float models in every layout and container the importers read.
cp examples/pipeline/lstm_x4_h16.safetensors "$corpus/import_safetensors/example_split.safetensors"
for f in tests/data/layouts/*.safetensors; do cp "$f" "$corpus/import_safetensors/"; done
for f in tests/data/layouts/*.npz; do cp "$f" "$corpus/import_npz/"; done

# Data: CSV with and without labels, quoted, CRLF; .npy float32 and float64.
head -n 6 examples/pipeline/signal.csv >"$corpus/data_csv/signal_head.csv"
head -n 6 "$tmp/sample.csv" >"$corpus/data_csv/labelled_head.csv"
printf 's0,"s1"\r\n1.5,-2e-3\r\n0,7\r\n' >"$corpus/data_csv/crlf_quoted.csv"
printf 'x\n1\n2\n3\n' >"$corpus/data_csv/one_column.csv"
# .npy v1.0 written by hand: magic, version, header length, header dict
# padded with spaces to a 64-byte boundary and ended by a newline, data.
npy() { # npy OUT DESCR SHAPE DATA_PRINTF
    local dict="{'descr': '$2', 'fortran_order': False, 'shape': $3, }"
    local len=$(( ${#dict} + 1 )) pad
    pad=$(( (64 - (10 + len) % 64) % 64 ))
    len=$(( len + pad ))
    {
        printf '\x93NUMPY\x01\x00'
        printf "\\x$(printf %02x $((len & 255)))\\x$(printf %02x $((len >> 8)))"
        printf '%s%*s\n' "$dict" "$pad" ''
        printf "$4"
    } >"$1"
}
# float32 [3, 2]: 1, -1, 0.5, 2, 0, 3.
npy "$corpus/data_npy/f32_3x2.npy" '<f4' '(3, 2)' \
    '\x00\x00\x80\x3f\x00\x00\x80\xbf\x00\x00\x00\x3f\x00\x00\x00\x40\x00\x00\x00\x00\x00\x00\x40\x40'
# float64 [2]: 1, -2.
npy "$corpus/data_npy/f64_2.npy" '<f8' '(2,)' \
    '\x00\x00\x00\x00\x00\x00\xf0\x3f\x00\x00\x00\x00\x00\x00\x00\xc0'

# TOML: the shipped budget and scenario.
cp examples/budget/fan-monitor.toml "$corpus/config_toml/"
cp demo-data/scenario.toml "$corpus/config_toml/"

for t in "$corpus"/*/; do
    echo "seeds: $(ls "$t" | wc -l) files in $t"
done
