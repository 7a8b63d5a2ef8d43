#!/usr/bin/env python3
"""Generate golden LSTM reference data for the Lapwing Rust tests.

This script is the *outside reference* for Lapwing: it runs PyTorch's
``torch.nn.LSTM`` (plus an optional ``torch.nn.Linear`` head) in float32 on the
CPU and writes what it computed, so the Rust float reference model can be
checked against an independent, widely used implementation.

For every model case below it writes ``tests/data/golden/<case>.json`` holding
the weights (PyTorch layout, gate order i,f,g,o), the input sequence, and the
per-step hidden state ``h`` and cell state ``c`` of *every* layer, plus the
head output ``y`` when the case has a head.  For case ``x4_h16_l2_head`` it
also writes the same weights as ``<case>.safetensors`` and ``<case>.npz``
(tensor names ``rnn.weight_ih_l0`` ... ``proj.weight``, ``proj.bias``) so the
importers can be tested on real PyTorch exports.

Per-layer states are obtained by calling the full ``nn.LSTM`` module one time
step at a time while carrying ``(h, c)``; the returned ``(h_n, c_n)`` hold every
layer's state for that step.  The script asserts that the step-by-step
last-layer output matches a single full-sequence call to within 1e-6, that the
JSON round-trips to the exact float32 values, and (re-reading each JSON file)
that a hand-written numpy LSTM cell reproduces the first step of each layer to
within 1e-6.

Everything is deterministic (fixed seeds, one CPU thread).  Regenerate from the
repository root with::

    python3 tools/golden/make_lstm_golden.py

Requires Python 3.11+, torch, numpy and safetensors.  It is never run in CI;
the generated files are checked in.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import numpy as np
import torch
from torch import nn
from safetensors.torch import save_file

REPO_ROOT = Path(__file__).resolve().parents[2]
OUT_DIR = REPO_ROOT / "tests" / "data" / "golden"

BASE_SEED = 20250
STEP_VS_FULL_TOL = 1e-6
SELF_CHECK_TOL = 1e-6

# name, input_size X, hidden_size H, num_layers L, head output Y (or None),
# steps T, multiplier applied to PyTorch's default init (weights and biases).
CASES = [
    ("x3_h5_l1", 3, 5, 1, None, 200, 1.0),
    ("x4_h8_l1_head", 4, 8, 1, 4, 300, 1.0),
    ("x4_h16_l2_head", 4, 16, 2, 2, 250, 2.5),  # pushes gates into saturation
    ("x1_h32_l3", 1, 32, 3, None, 220, 1.0),
]

# Cases that also get .safetensors and .npz exports.
EXPORT_CASES = {"x4_h16_l2_head"}


class Model(nn.Module):
    """Wrapper whose state_dict names are rnn.* and proj.*."""

    def __init__(self, x: int, h: int, layers: int, y: int | None):
        super().__init__()
        self.rnn = nn.LSTM(x, h, num_layers=layers, batch_first=True)
        self.proj = nn.Linear(h, y) if y is not None else None


def make_inputs(rng: np.random.Generator, steps: int, features: int) -> np.ndarray:
    """Per feature: sine + mean-reverting random walk + noise, peak 0.5..3."""
    t = np.arange(steps, dtype=np.float64)
    cols = []
    for _ in range(features):
        period = rng.uniform(12.0, 80.0)
        phase = rng.uniform(0.0, 2.0 * np.pi)
        sine = rng.uniform(0.5, 1.5) * np.sin(2.0 * np.pi * t / period + phase)
        walk = np.empty(steps)
        acc = rng.normal(0.0, 0.5)
        for k in range(steps):
            acc = 0.97 * acc + rng.normal(0.0, 0.15)
            walk[k] = acc
        noise = rng.normal(0.0, rng.uniform(0.05, 0.3), size=steps)
        col = sine + walk + noise + rng.uniform(-0.5, 0.5)
        peak = rng.uniform(0.5, 3.0)
        col = col * (peak / np.max(np.abs(col)))
        cols.append(col)
    return np.stack(cols, axis=1).astype(np.float32)


def flat(t: torch.Tensor) -> list[float]:
    """Row-major flattening to exact Python floats."""
    return [float(v) for v in t.detach().to(torch.float32).contiguous().reshape(-1).tolist()]


def sigmoid(v: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-v))


def self_check(path: Path) -> float:
    """Reload a JSON file and recompute step 0 of every layer with numpy."""
    with open(path) as f:
        d = json.load(f)
    hs = d["hidden_size"]
    assert d["gate_order"] == "i,f,g,o"
    assert len(d["inputs"]) == d["steps"] == len(d["h"]) == len(d["c"])
    x = np.asarray(d["inputs"][0], dtype=np.float64)
    worst = 0.0
    for k, layer in enumerate(d["layers"]):
        xk = layer["input_size"]
        w_x = np.asarray(layer["w_x"], dtype=np.float64).reshape(4 * hs, xk)
        b = np.asarray(layer["b_ih"], dtype=np.float64) + np.asarray(layer["b_hh"], dtype=np.float64)
        # Zero initial state, so the w_h term vanishes and c = i * g.
        z = w_x @ x + b
        i, fg, g, o = z[:hs], z[hs:2 * hs], z[2 * hs:3 * hs], z[3 * hs:]
        c = sigmoid(fg) * 0.0 + sigmoid(i) * np.tanh(g)
        h = sigmoid(o) * np.tanh(c)
        dh = np.max(np.abs(h - np.asarray(d["h"][0][k])))
        dc = np.max(np.abs(c - np.asarray(d["c"][0][k])))
        assert dh <= SELF_CHECK_TOL and dc <= SELF_CHECK_TOL, (path.name, k, dh, dc)
        worst = max(worst, dh, dc)
        x = np.asarray(d["h"][0][k], dtype=np.float64)  # input to the next layer
    if d["head"] is not None:
        w = np.asarray(d["head"]["w"], dtype=np.float64).reshape(d["output_size"], hs)
        bh = np.asarray(d["head"]["b"], dtype=np.float64)
        y = w @ np.asarray(d["h"][0][-1], dtype=np.float64) + bh
        dy = np.max(np.abs(y - np.asarray(d["y"][0])))
        assert dy <= SELF_CHECK_TOL, (path.name, "head", dy)
        worst = max(worst, dy)
    return worst


def run_case(index: int, name: str, x_size: int, h_size: int, layers: int,
             y_size: int | None, steps: int, scale: float) -> Path:
    seed = BASE_SEED + index
    torch.manual_seed(seed)
    model = Model(x_size, h_size, layers, y_size).eval()
    if scale != 1.0:
        with torch.no_grad():
            for p in model.parameters():
                p.mul_(scale)

    inputs_np = make_inputs(np.random.default_rng(seed), steps, x_size)
    xs = torch.from_numpy(inputs_np).unsqueeze(0)  # (1, T, X)

    h_rec, c_rec, y_rec = [], [], []
    with torch.no_grad():
        h = torch.zeros(layers, 1, h_size, dtype=torch.float32)
        c = torch.zeros(layers, 1, h_size, dtype=torch.float32)
        step_out = []
        for t in range(steps):
            out, (h, c) = model.rnn(xs[:, t:t + 1, :], (h, c))
            assert torch.equal(out[0, 0], h[-1, 0])
            step_out.append(out[0, 0].clone())
            h_rec.append([flat(h[k, 0]) for k in range(layers)])
            c_rec.append([flat(c[k, 0]) for k in range(layers)])
            if model.proj is not None:
                y_rec.append(flat(model.proj(h[-1, 0])))
        full_out, _ = model.rnn(xs)
        diff = (full_out[0] - torch.stack(step_out)).abs().max().item()
    assert diff <= STEP_VS_FULL_TOL, f"{name}: step-by-step vs full sequence differ by {diff}"

    sd = model.rnn.state_dict()
    layer_list = []
    for k in range(layers):
        layer_list.append({
            "input_size": x_size if k == 0 else h_size,
            "w_x": flat(sd[f"weight_ih_l{k}"]),
            "w_h": flat(sd[f"weight_hh_l{k}"]),
            "b_ih": flat(sd[f"bias_ih_l{k}"]),
            "b_hh": flat(sd[f"bias_hh_l{k}"]),
        })
    head = None
    if model.proj is not None:
        head = {"w": flat(model.proj.weight), "b": flat(model.proj.bias)}

    doc = {
        "case": name,
        "source": f"PyTorch nn.LSTM (torch {torch.__version__}), "
                  f"tools/golden/make_lstm_golden.py, seed {seed}",
        "input_size": x_size,
        "hidden_size": h_size,
        "num_layers": layers,
        "output_size": y_size,
        "steps": steps,
        "gate_order": "i,f,g,o",
        "layers": layer_list,
        "head": head,
        "inputs": [[float(v) for v in row] for row in inputs_np],
        "h": h_rec,
        "c": c_rec,
        "y": y_rec if model.proj is not None else None,
    }
    path = OUT_DIR / f"{name}.json"
    with open(path, "w") as f:
        json.dump(doc, f, separators=(",", ":"))
        f.write("\n")

    # Exact float32 round trip of what was written.
    with open(path) as f:
        back = json.load(f)
    assert np.array_equal(np.asarray(back["inputs"], dtype=np.float32), inputs_np)
    for k in range(layers):
        got = np.asarray(back["layers"][k]["w_h"], dtype=np.float32)
        assert np.array_equal(got, sd[f"weight_hh_l{k}"].numpy().reshape(-1))

    worst = self_check(path)

    if name in EXPORT_CASES:
        tensors = {k: v.detach().contiguous().clone() for k, v in model.state_dict().items()}
        st_path = OUT_DIR / f"{name}.safetensors"
        save_file(tensors, str(st_path))
        os.chmod(st_path, 0o644)  # safetensors creates the file as 0600
        np.savez(OUT_DIR / f"{name}.npz", **{k: v.numpy() for k, v in tensors.items()})

    max_c = float(np.abs(np.asarray(c_rec)).max())
    print(f"{name}: seed {seed}, step/full diff {diff:.2e}, "
          f"numpy step-0 check {worst:.2e}, max|c| {max_c:.3f}, {path.stat().st_size} bytes")
    return path


def main() -> int:
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    print(f"torch {torch.__version__}, numpy {np.__version__}, writing to {OUT_DIR}")
    for index, case in enumerate(CASES):
        run_case(index, *case)
    total = sum(p.stat().st_size for p in OUT_DIR.iterdir() if p.is_file())
    print(f"total size of {OUT_DIR.relative_to(REPO_ROOT)}: {total} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
