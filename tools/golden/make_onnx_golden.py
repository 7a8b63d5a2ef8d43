#!/usr/bin/env python3
"""Generate ONNX LSTM models and ONNX Runtime reference outputs for Lapwing.

This script is the *outside reference* for Lapwing's ONNX import: it builds
small ONNX models holding ``LSTM`` operators (by hand with ``onnx.helper``, and
through PyTorch's own exporter ``torch.onnx.export``), gives them seeded random
weights, runs them in **ONNX Runtime** (CPU, float32) on seeded random inputs
and writes, for every case, under ``tests/data/onnx/``:

- ``<case>.onnx``: the model;
- ``<case>.json``: the input sequence and ONNX Runtime's output, one vector
  per time step (batch size 1), see ``tests/data/onnx/README.md``.

It also writes ``tests/data/onnx/refused/*.onnx``: models that use LSTM
features or graph glue Lapwing refuses (bidirectional, peepholes, clip, ...).

Self-checks: every hand-built case is compared with a numpy LSTM written
below, and every exported case with the PyTorch module it came from, both to
within 1e-5; the JSON is read back and must hold exactly the float32 values.

Deterministic (fixed seeds, one thread). Regenerate from the repository root::

    python3 tools/golden/make_onnx_golden.py

Requires numpy, onnx, onnxruntime, torch and onnxscript (for the default
``torch.onnx.export`` path). Never run in CI; the generated files are checked
in.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import torch
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from torch import nn

REPO_ROOT = Path(__file__).resolve().parents[2]
OUT_DIR = REPO_ROOT / "tests" / "data" / "onnx"
REFUSED_DIR = OUT_DIR / "refused"
OPSET = 17
SELF_CHECK_TOL = 1e-5

torch.set_num_threads(1)


def ort_version() -> str:
    return f"ONNX Runtime {ort.__version__} (CPUExecutionProvider)"


def run_ort(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    sess = ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    return sess.run(None, feeds)


def rand(rng: np.random.Generator, *shape: int, scale: float = 0.5) -> np.ndarray:
    return (rng.uniform(-1.0, 1.0, size=shape) * scale).astype(np.float32)


def make_inputs(rng: np.random.Generator, steps: int, features: int) -> np.ndarray:
    """[T, X] float32: a sine per feature plus noise, peak magnitude about 2."""
    t = np.arange(steps, dtype=np.float64)[:, None]
    phase = rng.uniform(0, 2 * np.pi, size=(1, features))
    period = rng.uniform(8, 40, size=(1, features))
    x = 1.5 * np.sin(2 * np.pi * t / period + phase) + 0.4 * rng.standard_normal((steps, features))
    return x.astype(np.float32)


# --- numpy reference LSTM (ONNX gate order i, o, f, c) -----------------------


def sigmoid(v: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-v))


def np_lstm(x: np.ndarray, w: np.ndarray, r: np.ndarray, b: np.ndarray | None) -> np.ndarray:
    """x [T, X]; w [4H, X]; r [4H, H]; b [8H] or None. Returns h per step [T, H]."""
    h_size = r.shape[1]
    bias = np.zeros(4 * h_size) if b is None else b[: 4 * h_size].astype(np.float64) + b[4 * h_size :]
    h = np.zeros(h_size)
    c = np.zeros(h_size)
    out = []
    for xt in x.astype(np.float64):
        z = w @ xt + r @ h + bias
        i, o, f, g = (z[k * h_size : (k + 1) * h_size] for k in range(4))
        c = sigmoid(f) * c + sigmoid(i) * np.tanh(g)
        h = sigmoid(o) * np.tanh(c)
        out.append(h)
    return np.array(out)


# --- graph building ----------------------------------------------------------


def lstm_weights(rng: np.random.Generator, x_size: int, h_size: int, dirs: int = 1):
    w = rand(rng, dirs, 4 * h_size, x_size)
    r = rand(rng, dirs, 4 * h_size, h_size)
    b = rand(rng, dirs, 8 * h_size, scale=0.3)
    return w, r, b


def init(name: str, a: np.ndarray) -> TensorProto:
    return numpy_helper.from_array(a, name)


def ints(name: str, values: list[int]) -> TensorProto:
    return numpy_helper.from_array(np.array(values, dtype=np.int64), name)


def finish(graph: onnx.GraphProto) -> onnx.ModelProto:
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="make_onnx_golden")
    model.ir_version = 8
    return model


def tensor_info(name: str, dims: list) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, TensorProto.FLOAT, dims)


def case_one_layer(rng: np.random.Generator):
    """One LSTM, layout 0, input [T, 1, 3], the LSTM's Y [T, 1, 1, 8] is the graph output."""
    x_size, h_size = 3, 8
    w, r, b = lstm_weights(rng, x_size, h_size)
    node = helper.make_node("LSTM", ["x", "W", "R", "B"], ["y"], name="lstm", hidden_size=h_size)
    graph = helper.make_graph(
        [node],
        "one_layer",
        [tensor_info("x", ["T", 1, x_size])],
        [tensor_info("y", ["T", 1, 1, h_size])],
        [init("W", w), init("R", r), init("B", b)],
    )

    def reference(x):
        return np_lstm(x, w[0], r[0], b[0])

    return finish(graph), x_size, reference, lambda x: x[:, None, :], lambda y: y[:, 0, 0, :]


def case_two_layers_gemm(rng: np.random.Generator):
    """Two stacked LSTMs (zero initial states as an initializer and as
    ConstantOfShape), Squeeze between them, Squeeze then Gemm (transB=1)."""
    x_size, h_size, y_size = 4, 6, 2
    w0, r0, b0 = lstm_weights(rng, x_size, h_size)
    w1, r1, b1 = lstm_weights(rng, h_size, h_size)
    head_w = rand(rng, y_size, h_size)
    head_b = rand(rng, y_size, scale=0.3)
    zeros = np.zeros((1, 1, h_size), dtype=np.float32)
    nodes = [
        helper.make_node("LSTM", ["x", "W0", "R0", "B0", "", "h0", "h0"], ["y0"], name="lstm_0", hidden_size=h_size),
        helper.make_node("Squeeze", ["y0", "axis_dir"], ["s0"], name="squeeze_0"),
        helper.make_node("ConstantOfShape", ["state_shape"], ["h1"], name="zero_state"),
        helper.make_node("LSTM", ["s0", "W1", "R1", "B1", "", "h1", "h1"], ["y1"], name="lstm_1", hidden_size=h_size),
        helper.make_node("Squeeze", ["y1", "axes_dir_batch"], ["s1"], name="squeeze_1"),
        helper.make_node("Gemm", ["s1", "head_w", "head_b"], ["y"], name="head", transB=1),
    ]
    graph = helper.make_graph(
        nodes,
        "two_layers_gemm",
        [tensor_info("x", ["T", 1, x_size])],
        [tensor_info("y", ["T", y_size])],
        [
            init("W0", w0), init("R0", r0), init("B0", b0), init("h0", zeros),
            init("W1", w1), init("R1", r1), init("B1", b1),
            ints("axis_dir", [1]), ints("axes_dir_batch", [1, 2]), ints("state_shape", [1, 1, h_size]),
            init("head_w", head_w), init("head_b", head_b),
        ],
    )

    def reference(x):
        h = np_lstm(np_lstm(x, w0[0], r0[0], b0[0]), w1[0], r1[0], b1[0])
        return h @ head_w.T.astype(np.float64) + head_b

    return finish(graph), x_size, reference, lambda x: x[:, None, :], lambda y: y


def case_layout1_matmul(rng: np.random.Generator):
    """layout = 1 ([batch, time, features]), zero initial_h as a Constant node,
    Reshape dropping the direction axis, MatMul + Add head.

    ONNX Runtime's CPU LSTM refuses layout 1, so ONNX Runtime runs a twin
    graph with the same weights: Transpose to layout 0, the LSTM with
    layout 0, Transpose back. The layout-1 file itself is run by the onnx
    package's reference evaluator and must agree with it."""
    x_size, h_size, y_size = 2, 5, 3
    w, r, b = lstm_weights(rng, x_size, h_size)
    head_w = rand(rng, h_size, y_size)
    head_b = rand(rng, y_size, scale=0.3)
    zeros = helper.make_tensor("zeros", TensorProto.FLOAT, [1, 1, h_size], [0.0] * h_size)
    nodes = [
        helper.make_node("Constant", [], ["h0"], name="zero_state", value=zeros),
        helper.make_node("LSTM", ["x", "W", "R", "B", "", "h0", "h0"], ["y_lstm"], name="lstm", hidden_size=h_size,
                         layout=1),
        helper.make_node("Reshape", ["y_lstm", "shape_bth"], ["h"], name="drop_direction"),
        helper.make_node("MatMul", ["h", "head_w"], ["hw"], name="head_matmul"),
        helper.make_node("Add", ["hw", "head_b"], ["y"], name="head_bias"),
    ]
    graph = helper.make_graph(
        nodes,
        "layout1_matmul",
        [tensor_info("x", [1, "T", x_size])],
        [tensor_info("y", [1, "T", y_size])],
        [init("W", w), init("R", r), init("B", b), ints("shape_bth", [0, 0, -1]),
         init("head_w", head_w), init("head_b", head_b)],
    )

    def reference(x):
        return np_lstm(x, w[0], r[0], b[0]) @ head_w.astype(np.float64) + head_b

    twin_nodes = [
        helper.make_node("Transpose", ["x"], ["x_tbf"], name="to_layout0", perm=[1, 0, 2]),
        helper.make_node("LSTM", ["x_tbf", "W", "R", "B"], ["y_tdbh"], name="lstm", hidden_size=h_size),
        helper.make_node("Transpose", ["y_tdbh"], ["y_lstm"], name="to_layout1", perm=[2, 0, 1, 3]),
        *nodes[2:],
    ]
    twin = helper.make_graph(twin_nodes, "layout1_twin", list(graph.input), list(graph.output), list(graph.initializer))
    return finish(graph), x_size, reference, lambda x: x[None, :, :], lambda y: y[0], finish(twin)


class LstmHead(nn.Module):
    def __init__(self, x_size: int, h_size: int, layers: int, y_size: int):
        super().__init__()
        self.rnn = nn.LSTM(x_size, h_size, num_layers=layers, batch_first=True)
        self.proj = nn.Linear(h_size, y_size)

    def forward(self, x):
        y, _ = self.rnn(x)
        return self.proj(y)


def exported(rng: np.random.Generator, seed: int, dynamo: bool, steps: int):
    """nn.LSTM (2 layers, batch_first) + nn.Linear written by torch.onnx.export.

    The TorchScript exporter (dynamo=False) gets a dynamic time axis and builds
    the zero initial states from Shape/Gather/Unsqueeze/Concat/Expand; the
    default exporter (dynamo=True) bakes the example shape in and uses
    Transpose/Reshape around each LSTM."""
    x_size, h_size, y_size = 3, 8, 2
    torch.manual_seed(seed)
    module = LstmHead(x_size, h_size, 2, y_size).eval()
    example = torch.from_numpy(make_inputs(rng, steps, x_size))[None]
    path = OUT_DIR / "_export_tmp.onnx"
    kwargs = dict(input_names=["x"], output_names=["y"], dynamo=dynamo)
    if dynamo:
        # The exporter's own default opset.
        kwargs["external_data"] = False
        kwargs["verbose"] = False
    else:
        kwargs["opset_version"] = OPSET
        kwargs["dynamic_axes"] = {"x": {1: "T"}, "y": {1: "T"}}
    torch.onnx.export(module, (example,), str(path), **kwargs)
    model = onnx.load(str(path))
    path.unlink()
    for extra in OUT_DIR.glob("_export_tmp.onnx*"):
        extra.unlink()

    def reference(x):
        with torch.no_grad():
            return module(torch.from_numpy(x)[None])[0].double().numpy()

    return model, x_size, reference, lambda x: x[None, :, :], lambda y: y[0]


def write_case(name: str, seed: int, built, steps: int, what: str) -> None:
    model, x_size, reference, to_feed, from_output, *twin = built
    onnx.checker.check_model(model)
    rng = np.random.default_rng(seed + 1)
    x = make_inputs(rng, steps, x_size)
    feeds = {model.graph.input[0].name: to_feed(x)}
    source = f"{ort_version()}, tools/golden/make_onnx_golden.py, seed {seed}"
    if twin:
        onnx.checker.check_model(twin[0])
        (y,) = run_ort(twin[0], feeds)
        (y_ref,) = ReferenceEvaluator(model).run(None, feeds)
        diff = float(np.abs(y_ref.astype(np.float64) - y).max())
        assert diff <= SELF_CHECK_TOL, f"{name}: reference evaluator on the file vs ONNX Runtime on its twin: {diff}"
        source += " (on the layout-0 twin graph; the file itself agrees under onnx.reference to %.1e)" % diff
    else:
        (y,) = run_ort(model, feeds)
    y = from_output(y).astype(np.float32)
    assert y.shape[0] == steps, y.shape
    err = float(np.abs(y.astype(np.float64) - reference(x)).max())
    assert err <= SELF_CHECK_TOL, f"{name}: ONNX Runtime vs self-check reference differ by {err}"
    (OUT_DIR / f"{name}.onnx").write_bytes(model.SerializeToString())
    doc = {
        "case": name,
        "source": source,
        "model": f"{name}.onnx",
        "what": what,
        "producer": f"{model.producer_name} {model.producer_version}".strip(),
        "steps": steps,
        "inputs": [[float(v) for v in row] for row in x],
        "outputs": [[float(v) for v in row] for row in y],
    }
    path = OUT_DIR / f"{name}.json"
    path.write_text(json.dumps(doc, separators=(",", ":")) + "\n")
    back = json.loads(path.read_text())
    assert np.array_equal(np.array(back["outputs"], dtype=np.float32), y)
    assert np.array_equal(np.array(back["inputs"], dtype=np.float32), x)
    print(f"{name}: T={steps}, self-check max |diff| {err:.2e}")


# --- refused models ----------------------------------------------------------


def refused_lstm(name: str, rng: np.random.Generator, dirs: int = 1, extra_inputs=(), extra_inits=(), glue=None,
                 **attrs) -> None:
    """A one-LSTM model (X=2, H=3) with one refused feature."""
    x_size, h_size = 2, 3
    w, r, b = lstm_weights(rng, x_size, h_size, dirs)
    inputs = ["x", "W", "R", "B", *extra_inputs]
    nodes = [helper.make_node("LSTM", inputs, ["y"], name="lstm", hidden_size=h_size, **attrs)]
    out = "y"
    if glue is not None:
        nodes.append(glue)
        out = glue.output[0]
    graph = helper.make_graph(
        nodes, name, [tensor_info("x", ["T", 1, x_size])], [tensor_info(out, None)],
        [init("W", w), init("R", r), init("B", b), *extra_inits],
    )
    model = finish(graph)
    (REFUSED_DIR / f"{name}.onnx").write_bytes(model.SerializeToString())


def write_refused(seed: int) -> None:
    rng = np.random.default_rng(seed)
    h = 3
    refused_lstm("bidirectional", rng, dirs=2, direction="bidirectional")
    refused_lstm("reverse", rng, direction="reverse")
    refused_lstm("clip", rng, clip=3.0)
    refused_lstm("input_forget", rng, input_forget=1)
    refused_lstm("activations", rng, activations=["Sigmoid", "Relu", "Tanh"])
    refused_lstm("peepholes", rng, extra_inputs=["", "", "", "P"], extra_inits=[init("P", rand(rng, 1, 3 * h))])
    refused_lstm("sequence_lens", rng, extra_inputs=["seq"],
                 extra_inits=[numpy_helper.from_array(np.array([5], dtype=np.int32), "seq")])
    refused_lstm("nonzero_initial_h", rng, extra_inputs=["", "h0"],
                 extra_inits=[init("h0", np.full((1, 1, h), 0.25, dtype=np.float32))])
    refused_lstm("relu_after_lstm", rng, glue=helper.make_node("Relu", ["y"], ["y_relu"], name="relu"))
    # A weight claiming 2^40 elements with no data: must be refused before any
    # allocation (onnx.checker is not run on these files).
    x_size = 2
    w = TensorProto(name="W", data_type=TensorProto.FLOAT, dims=[1, 1 << 20, 1 << 20])
    r = init("R", rand(rng, 1, 4 * h, h))
    graph = helper.make_graph(
        [helper.make_node("LSTM", ["x", "W", "R"], ["y"], name="lstm", hidden_size=h)],
        "huge_tensor", [tensor_info("x", ["T", 1, x_size])], [tensor_info("y", None)], [w, r],
    )
    (REFUSED_DIR / "huge_tensor.onnx").write_bytes(finish(graph).SerializeToString())


def main() -> int:
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    REFUSED_DIR.mkdir(parents=True, exist_ok=True)
    base = 90210
    write_case("one_layer_x3_h8", base, case_one_layer(np.random.default_rng(base)), 60,
               "one LSTM, layout 0, graph output is the LSTM's Y [T, 1, 1, H]")
    write_case("two_layers_gemm_x4_h6_y2", base + 10, case_two_layers_gemm(np.random.default_rng(base + 10)), 60,
               "two LSTMs, zero initial states (initializer, ConstantOfShape), Squeeze, Gemm head")
    write_case("layout1_matmul_x2_h5_y3", base + 20, case_layout1_matmul(np.random.default_rng(base + 20)), 60,
               "LSTM layout 1, zero initial_h from a Constant node, Reshape, MatMul + Add head")
    write_case("torch_script_x3_h8_l2_y2", base + 30, exported(np.random.default_rng(base + 30), base + 30, False, 16),
               50, "torch.onnx.export(dynamo=False) of nn.LSTM(batch_first) + nn.Linear, dynamic time axis")
    write_case("torch_dynamo_x3_h8_l2_y2", base + 40, exported(np.random.default_rng(base + 40), base + 40, True, 40),
               40, "torch.onnx.export (default exporter) of nn.LSTM(batch_first) + nn.Linear, fixed shape [1, 40, 3]")
    write_refused(base + 50)
    total = sum(p.stat().st_size for p in OUT_DIR.rglob("*") if p.is_file())
    print(f"wrote {OUT_DIR} ({total} bytes)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
