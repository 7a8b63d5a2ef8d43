#!/usr/bin/env python3
"""PyTorch nn.LSTM one step at a time (streaming, batch 1, CPU) against
`lapwing run` on the same model and data: what a user would otherwise run
on the host. Optional (PyTorch is large), run by hand, never in CI.

    cargo build --release -p lapwing-tools
    python3 tools/bench_torch.py                       # demo model, demo sample
    python3 tools/bench_torch.py --model M.safetensors --data D.csv --steps 20000

PyTorch is timed on its step loop alone (model built, inputs already tensors);
`lapwing run` is timed as the whole command (process start, quantized blob
read, CSV parsed and written), so the ratio is conservative for Lapwing.
"""
import argparse, json, os, struct, subprocess, sys, tempfile, time

import numpy as np
import torch

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def load_safetensors(path):
    """Lapwing's safetensors layout: layers.K.{w_x,w_h,b}, head.{w,b}, norm.{mean,std}."""
    raw = open(path, "rb").read()
    n = struct.unpack("<Q", raw[:8])[0]
    header = json.loads(raw[8:8 + n])
    out = {}
    for name, t in header.items():
        if name == "__metadata__":
            continue
        assert t["dtype"] == "F32", name
        a, b = t["data_offsets"]
        out[name] = np.frombuffer(raw[8 + n + a:8 + n + b], dtype="<f4").reshape(t["shape"]).copy()
    return out


def torch_model(t):
    layers = sorted({int(k.split(".")[1]) for k in t if k.startswith("layers.")})
    w_x = t["layers.0.w_x"]
    hidden = t["layers.0.w_h"].shape[1]
    lstm = torch.nn.LSTM(w_x.shape[1], hidden, num_layers=len(layers), batch_first=True)
    with torch.no_grad():
        for k in layers:
            # Same gate order (i, f, g, o); Lapwing's single bias goes to b_ih.
            getattr(lstm, f"weight_ih_l{k}").copy_(torch.from_numpy(t[f"layers.{k}.w_x"]))
            getattr(lstm, f"weight_hh_l{k}").copy_(torch.from_numpy(t[f"layers.{k}.w_h"]))
            getattr(lstm, f"bias_ih_l{k}").copy_(torch.from_numpy(t[f"layers.{k}.b"]))
            getattr(lstm, f"bias_hh_l{k}").zero_()
    head = None
    if "head.w" in t:
        head = torch.nn.Linear(hidden, t["head.w"].shape[0])
        with torch.no_grad():
            head.weight.copy_(torch.from_numpy(t["head.w"]))
            head.bias.copy_(torch.from_numpy(t["head.b"]))
    return lstm, head


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--model", default=os.path.join(ROOT, "demo-data/model.safetensors"))
    ap.add_argument("--data", default=os.path.join(ROOT, "demo-data/sample.csv"))
    ap.add_argument("--steps", type=int, default=20000)
    ap.add_argument("--scheme", default="w8a16")
    ap.add_argument("--lapwing", default=os.path.join(ROOT, "target/release/lapwing"))
    a = ap.parse_args()
    torch.set_num_threads(1)

    t = load_safetensors(a.model)
    x_in = t["layers.0.w_x"].shape[1]
    rows = np.loadtxt(a.data, delimiter=",", skiprows=1, usecols=range(x_in), dtype=np.float32)
    reps = -(-a.steps // len(rows))
    rows = np.tile(rows, (reps, 1))[:a.steps]

    with tempfile.TemporaryDirectory() as d:
        data = os.path.join(d, "data.csv")
        np.savetxt(data, rows, delimiter=",", header=",".join(f"x{i}" for i in range(x_in)), comments="", fmt="%.8g")
        blob = os.path.join(d, "model.lwq")
        subprocess.run([a.lapwing, "quantize", a.model, "--calib", a.data, "--scheme", a.scheme, "-o", blob],
                       check=True, stdout=subprocess.DEVNULL)
        best_l = min(timed([a.lapwing, "run", blob, "--data", data, "-o", os.path.join(d, "out.csv")]) for _ in range(3))

    lstm, head = torch_model(t)
    xs = torch.from_numpy(rows)
    if "norm.mean" in t:
        xs = (xs - torch.from_numpy(t["norm.mean"])) / torch.from_numpy(t["norm.std"])
    xs = xs.reshape(len(rows), 1, 1, x_in)
    best_t = float("inf")
    with torch.inference_mode():
        for _ in range(3):
            state = None
            t0 = time.perf_counter()
            for x in xs:
                y, state = lstm(x, state)
                if head is not None:
                    y = head(y)
            best_t = min(best_t, time.perf_counter() - t0)

    n = len(rows)
    print(f"model {os.path.relpath(a.model, ROOT)}, {n} steps, torch {torch.__version__} (1 thread)")
    print(f"PyTorch nn.LSTM, one step per call: {best_t / n * 1e6:8.2f} us/step")
    print(f"lapwing run ({a.scheme}, whole command): {best_l / n * 1e6:8.2f} us/step")
    print(f"ratio: {best_t / best_l:.1f}x in favour of lapwing run")


def timed(cmd):
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


if __name__ == "__main__":
    sys.exit(main())
