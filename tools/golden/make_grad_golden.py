#!/usr/bin/env python3
"""Generate golden loss gradients for Lapwing's trainer (``lapwing fit``).

Outside reference for the analytic gradients in ``tools/src/fit.rs``: for a
few small models it builds the same network in PyTorch -- ``torch.nn.LSTM``
(gate order i,f,g,o) plus a ``torch.nn.Linear`` head -- from weights given in
Lapwing's layout (``w_x [4H, X]``, ``w_h [4H, H]``, one bias ``b [4H]``,
copied as ``bias_ih = b`` and ``bias_hh = 0``; head ``w [Y, H]``, ``b [Y]``),
runs one window from a zero initial state, takes the mean squared error
against the targets (``nn.MSELoss()``, mean over every step and output) and
calls ``loss.backward()``.  PyTorch autograd's gradients are written to
``tests/data/grad/<case>.json``.

For each case the gradients are computed twice: in float32 (``grads``, what
the Rust trainer computes, written to the JSON) and with the same weights and
data in float64 (only to check the float32 values).  The script asserts that:

- the float32 gradient of ``bias_ih`` equals that of ``bias_hh`` (both are the
  gradient of the folded bias ``b``);
- ``torch.autograd.gradcheck`` (float64 central differences) accepts the
  float64 model, so the reference itself is checked;
- float32 and float64 gradients agree to within 1e-4 of each tensor's largest
  magnitude;
- the JSON holds exactly the float32 values written.

Deterministic (fixed seeds, one CPU thread).  Run from anywhere:

    python3 tools/golden/make_grad_golden.py

Requires Python 3.11+, torch and numpy.  Never run in CI; the output is
checked in.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import torch
from torch import nn

REPO_ROOT = Path(__file__).resolve().parents[2]
OUT_DIR = REPO_ROOT / "tests" / "data" / "grad"
BASE_SEED = 7100
F32_VS_F64_TOL = 1e-4

# name, X, H, L, T, gain on the U(-1/sqrt(H), 1/sqrt(H)) init
CASES = [
    ("x3_h5_l2_t7", 3, 5, 2, 7, 1.0),
    ("x4_h8_l1_t12", 4, 8, 1, 12, 2.5),  # larger weights: saturated gates
    ("x2_h6_l3_t9", 2, 6, 3, 9, 1.5),
]


class Net(nn.Module):
    def __init__(self, x: int, h: int, layers: int, y: int, dtype: torch.dtype):
        super().__init__()
        self.rnn = nn.LSTM(x, h, num_layers=layers, batch_first=True, dtype=dtype)
        self.head = nn.Linear(h, y, dtype=dtype)

    def forward(self, xs: torch.Tensor) -> torch.Tensor:
        out, _ = self.rnn(xs)  # zero initial state
        return self.head(out)


def make_weights(rng: np.random.Generator, x: int, h: int, layers: int, gain: float) -> dict:
    """Lapwing-layout float32 weights, U(-g/sqrt(H), g/sqrt(H)), forget bias +1."""
    k = gain / np.sqrt(h)
    w = {"layers": []}
    for layer in range(layers):
        xk = x if layer == 0 else h
        b = rng.uniform(-k, k, 4 * h)
        b[h:2 * h] += 1.0
        w["layers"].append({
            "input_size": xk,
            "w_x": rng.uniform(-k, k, (4 * h, xk)).astype(np.float32),
            "w_h": rng.uniform(-k, k, (4 * h, h)).astype(np.float32),
            "b": b.astype(np.float32),
        })
    w["head"] = {
        "w": rng.uniform(-k, k, (x, h)).astype(np.float32),
        "b": rng.uniform(-k, k, x).astype(np.float32),
    }
    return w


def make_signal(rng: np.random.Generator, steps: int, x: int) -> np.ndarray:
    """steps + 1 rows: a sine per feature plus noise, roughly standardized."""
    t = np.arange(steps + 1)[:, None]
    period = rng.uniform(5.0, 20.0, x)
    phase = rng.uniform(0.0, 2 * np.pi, x)
    sig = 1.2 * np.sin(2 * np.pi * t / period + phase) + rng.normal(0.0, 0.3, (steps + 1, x))
    return sig.astype(np.float32)


def build(w: dict, x: int, h: int, layers: int, dtype: torch.dtype) -> Net:
    net = Net(x, h, layers, x, dtype)
    with torch.no_grad():
        for k, lw in enumerate(w["layers"]):
            getattr(net.rnn, f"weight_ih_l{k}").copy_(torch.from_numpy(lw["w_x"]))
            getattr(net.rnn, f"weight_hh_l{k}").copy_(torch.from_numpy(lw["w_h"]))
            getattr(net.rnn, f"bias_ih_l{k}").copy_(torch.from_numpy(lw["b"]))
            getattr(net.rnn, f"bias_hh_l{k}").zero_()
        net.head.weight.copy_(torch.from_numpy(w["head"]["w"]))
        net.head.bias.copy_(torch.from_numpy(w["head"]["b"]))
    return net


def flat(t: torch.Tensor) -> list[float]:
    return [float(v) for v in t.detach().contiguous().reshape(-1).tolist()]


def grads_of(net: Net, layers: int, check_bias: bool) -> dict:
    out = {"layers": []}
    for k in range(layers):
        g_ih = getattr(net.rnn, f"bias_ih_l{k}").grad
        g_hh = getattr(net.rnn, f"bias_hh_l{k}").grad
        if check_bias:
            assert torch.equal(g_ih, g_hh), f"layer {k}: bias_ih and bias_hh gradients differ"
        out["layers"].append({
            "w_x": getattr(net.rnn, f"weight_ih_l{k}").grad,
            "w_h": getattr(net.rnn, f"weight_hh_l{k}").grad,
            "b": g_ih,
        })
    out["head"] = {"w": net.head.weight.grad, "b": net.head.bias.grad}
    return out


def tensors(g: dict):
    for k, lg in enumerate(g["layers"]):
        for name in ("w_x", "w_h", "b"):
            yield f"layers.{k}.{name}", lg[name]
    for name in ("w", "b"):
        yield f"head.{name}", g["head"][name]


def to_json(g: dict) -> dict:
    return {
        "layers": [{n: flat(lg[n].to(torch.float32)) for n in ("w_x", "w_h", "b")} for lg in g["layers"]],
        "head": {n: flat(g["head"][n].to(torch.float32)) for n in ("w", "b")},
    }


def run_case(index: int, name: str, x: int, h: int, layers: int, steps: int, gain: float) -> Path:
    seed = BASE_SEED + index
    rng = np.random.default_rng(seed)
    w = make_weights(rng, x, h, layers, gain)
    sig = make_signal(rng, steps, x)
    inputs, targets = sig[:-1], sig[1:]  # next-step prediction, as lapwing fit trains

    results = {}
    for dtype in (torch.float32, torch.float64):
        net = build(w, x, h, layers, dtype)
        xs = torch.from_numpy(inputs).to(dtype).unsqueeze(0)
        ts = torch.from_numpy(targets).to(dtype).unsqueeze(0)
        loss = nn.MSELoss()(net(xs), ts)
        loss.backward()
        results[dtype] = (loss.item(), grads_of(net, layers, dtype == torch.float32), net, xs, ts)

    # The reference checked against float64 central differences.
    _, _, net64, xs64, ts64 = results[torch.float64]
    params = [p.detach().clone().requires_grad_(True) for p in net64.parameters()]
    names = [n for n, _ in net64.named_parameters()]

    def loss_fn(*ps):
        sd = dict(zip(names, ps))
        y = torch.func.functional_call(net64, sd, (xs64,))
        return nn.MSELoss()(y, ts64)

    assert torch.autograd.gradcheck(loss_fn, tuple(params), eps=1e-6, atol=1e-8, rtol=1e-5)

    g32, g64 = results[torch.float32][1], results[torch.float64][1]
    worst = 0.0
    for (tname, a), (_, b) in zip(tensors(g32), tensors(g64)):
        scale = float(b.abs().max())
        d = float((a.to(torch.float64) - b).abs().max())
        assert d <= F32_VS_F64_TOL * max(scale, 1e-3), f"{name} {tname}: f32 vs f64 gradient differ by {d}"
        worst = max(worst, d / max(scale, 1e-3))

    doc = {
        "case": name,
        "source": f"PyTorch autograd (torch {torch.__version__}), nn.LSTM + nn.Linear, nn.MSELoss(), "
                  f"tools/golden/make_grad_golden.py, seed {seed}",
        "input_size": x,
        "hidden_size": h,
        "num_layers": layers,
        "output_size": x,
        "steps": steps,
        "gate_order": "i,f,g,o",
        "layers": [{"input_size": lw["input_size"], "w_x": flat(torch.from_numpy(lw["w_x"])),
                    "w_h": flat(torch.from_numpy(lw["w_h"])), "b": flat(torch.from_numpy(lw["b"]))}
                   for lw in w["layers"]],
        "head": {"w": flat(torch.from_numpy(w["head"]["w"])), "b": flat(torch.from_numpy(w["head"]["b"]))},
        "inputs": [[float(v) for v in row] for row in inputs],
        "targets": [[float(v) for v in row] for row in targets],
        "loss": float(np.float32(results[torch.float32][0])),
        "grads": to_json(g32),
    }
    path = OUT_DIR / f"{name}.json"
    with open(path, "w") as f:
        json.dump(doc, f, separators=(",", ":"))
        f.write("\n")

    with open(path) as f:
        back = json.load(f)
    assert np.array_equal(np.asarray(back["inputs"], dtype=np.float32), inputs)
    for k in range(layers):
        got = np.asarray(back["grads"]["layers"][k]["w_h"], dtype=np.float32)
        assert np.array_equal(got, g32["layers"][k]["w_h"].numpy().reshape(-1))
        assert np.array_equal(np.asarray(back["layers"][k]["w_x"], dtype=np.float32), w["layers"][k]["w_x"].reshape(-1))

    print(f"{name}: seed {seed}, loss {doc['loss']:.6f}, gradcheck ok, "
          f"f32 vs f64 gradients {worst:.1e} of max, {path.stat().st_size} bytes")
    return path


def main() -> int:
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    print(f"torch {torch.__version__}, numpy {np.__version__}, python {sys.version.split()[0]}, writing to {OUT_DIR}")
    for index, case in enumerate(CASES):
        run_case(index, *case)
    return 0


if __name__ == "__main__":
    sys.exit(main())
