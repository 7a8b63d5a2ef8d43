#!/usr/bin/env python3
"""Write the golden x4_h16_l2 LSTM in every tensor layout the importer reads.

Reads ``tests/data/golden/x4_h16_l2_head.safetensors`` (the ``state_dict`` of
PyTorch ``nn.LSTM`` + ``nn.Linear``, written by ``make_lstm_golden.py``; names
``rnn.*`` and ``proj.*``, gate order i,f,g,o) and writes the same weights to
``tests/data/layouts/``:

* ``x4_h16_l2_lapwing.safetensors``: Lapwing's own layout, ``layers.{k}.w_x``,
  ``layers.{k}.w_h``, ``layers.{k}.b`` (= bias_ih + bias_hh, added in float32),
  ``head.w``, ``head.b``; no normalization.
* ``x4_h16_l2_lapwing_norm.safetensors``: the same plus a non-trivial
  ``norm.mean`` / ``norm.std`` (``NORM_MEAN`` / ``NORM_STD`` below).
* ``x4_h16_l2_fused.npz`` (``np.savez``, stored members): the fused layout with
  ``[X, 4H]`` kernels, names ``lstm/kernel:0``, ``lstm/recurrent_kernel:0``,
  ``lstm/bias:0``, ``lstm_1/...``, ``dense/kernel:0``, ``dense/bias:0``.  Its
  gate order i,f,c,o is PyTorch's i,f,g,o under another name (c is the
  candidate), so the kernels are only transposed.
* ``x4_h16_l2_fused_compressed.npz``: the same through ``np.savez_compressed``
  (deflated members).
* ``x4_h16_l2_fused.safetensors``: the fused layout with other names
  (``encoder/lstm/kernel`` ... ``encoder/dense/bias``, no ``:0``) plus one
  integer tensor ``training/step`` that the importer must list as ignored.
* ``x4_h16_l2_split_npy/``: one ``.npy`` file per PyTorch tensor (split
  layout, names as in the state_dict).  To exercise the reader, the biases are
  stored as float64 (exact: they are float32 values), ``rnn.weight_hh_l1`` in
  Fortran order and ``rnn.weight_ih_l1`` big-endian; the values are unchanged.

Every file is read back and compared with the source weights.  Deterministic;
run from the repository root (needs only numpy and safetensors)::

    python3 tools/golden/make_layout_variants.py
"""

from __future__ import annotations

import shutil
import sys
import zipfile
from pathlib import Path

import numpy as np
from safetensors.numpy import load_file, save_file

REPO_ROOT = Path(__file__).resolve().parents[2]
SRC = REPO_ROOT / "tests" / "data" / "golden" / "x4_h16_l2_head.safetensors"
OUT = REPO_ROOT / "tests" / "data" / "layouts"
LAYERS = 2

# Non-trivial input normalization for the *_norm file: x_n = (x - mean) / std.
NORM_MEAN = np.array([0.25, -1.5, 3.0, 0.0], dtype=np.float32)
NORM_STD = np.array([2.0, 0.5, 4.0, 1.25], dtype=np.float32)


def f32(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32)


def main() -> int:
    src = load_file(str(SRC))
    OUT.mkdir(parents=True, exist_ok=True)

    # Lapwing's own layout.
    lap = {}
    for k in range(LAYERS):
        lap[f"layers.{k}.w_x"] = f32(src[f"rnn.weight_ih_l{k}"])
        lap[f"layers.{k}.w_h"] = f32(src[f"rnn.weight_hh_l{k}"])
        lap[f"layers.{k}.b"] = f32(src[f"rnn.bias_ih_l{k}"] + src[f"rnn.bias_hh_l{k}"])
    lap["head.w"] = f32(src["proj.weight"])
    lap["head.b"] = f32(src["proj.bias"])
    save_file(lap, str(OUT / "x4_h16_l2_lapwing.safetensors"))
    lap_norm = dict(lap)
    lap_norm["norm.mean"] = NORM_MEAN
    lap_norm["norm.std"] = NORM_STD
    save_file(lap_norm, str(OUT / "x4_h16_l2_lapwing_norm.safetensors"))

    # Fused layout: [X, 4H] kernels, one bias, gate order i,f,c,o (= i,f,g,o).
    def fused(group_name, head_name, sep, suffix):
        out = {}
        for k in range(LAYERS):
            g = group_name(k)
            out[f"{g}{sep}kernel{suffix}"] = f32(src[f"rnn.weight_ih_l{k}"].T)
            out[f"{g}{sep}recurrent_kernel{suffix}"] = f32(src[f"rnn.weight_hh_l{k}"].T)
            out[f"{g}{sep}bias{suffix}"] = lap[f"layers.{k}.b"]
        out[f"{head_name}{sep}kernel{suffix}"] = f32(src["proj.weight"].T)
        out[f"{head_name}{sep}bias{suffix}"] = f32(src["proj.bias"])
        return out

    keras = fused(lambda k: "lstm" if k == 0 else f"lstm_{k}", "dense", "/", ":0")
    np.savez(OUT / "x4_h16_l2_fused.npz", **keras)
    np.savez_compressed(OUT / "x4_h16_l2_fused_compressed.npz", **keras)
    with zipfile.ZipFile(OUT / "x4_h16_l2_fused_compressed.npz") as z:
        assert all(i.compress_type == zipfile.ZIP_DEFLATED for i in z.infolist())

    enc = fused(lambda k: "encoder/lstm" if k == 0 else f"encoder/lstm_{k}", "encoder/dense", "/", "")
    enc["training/step"] = np.array([1234], dtype=np.int64)
    save_file(enc, str(OUT / "x4_h16_l2_fused.safetensors"))

    # Split layout as a directory of .npy files, with reader edge cases.
    npy_dir = OUT / "x4_h16_l2_split_npy"
    if npy_dir.exists():
        shutil.rmtree(npy_dir)
    npy_dir.mkdir()
    for name, arr in src.items():
        if ".bias" in name:
            arr = arr.astype(np.float64)
        elif name == "rnn.weight_hh_l1":
            arr = np.asfortranarray(arr)
        elif name == "rnn.weight_ih_l1":
            arr = arr.astype(">f4")
        np.save(npy_dir / f"{name}.npy", arr)

    # Read everything back.
    def same(a, b):
        return a.shape == b.shape and np.array_equal(np.asarray(a, dtype=np.float32), b)

    back = load_file(str(OUT / "x4_h16_l2_lapwing_norm.safetensors"))
    assert all(same(back[k], v) for k, v in lap_norm.items())
    for name in ("x4_h16_l2_fused.npz", "x4_h16_l2_fused_compressed.npz"):
        with np.load(OUT / name) as z:
            assert sorted(z.files) == sorted(keras) and all(same(z[k], keras[k]) for k in keras)
    back = load_file(str(OUT / "x4_h16_l2_fused.safetensors"))
    assert sorted(back) == sorted(enc)
    assert np.isfortran(np.load(npy_dir / "rnn.weight_hh_l1.npy"))
    for name, arr in src.items():
        assert same(np.load(npy_dir / f"{name}.npy"), arr), name

    total = 0
    for p in sorted(OUT.rglob("*")):
        if p.is_file() and p.suffix != ".md":
            p.chmod(0o644)  # safetensors creates files as 0600
            total += p.stat().st_size
            print(f"{p.relative_to(REPO_ROOT)}: {p.stat().st_size} bytes")
    print(f"total {total} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
