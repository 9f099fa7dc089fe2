#!/usr/bin/env python3
"""Build lineside's small test models and their onnxruntime reference outputs.

Each case goes to tests/fixtures/<case>/ as model.onnx (+ classes.txt), built with the onnx
package from a layer table and seeded random weights. For the cases that should serve,
reference.json holds onnxruntime's raw outputs (logits) for a fixed input,
x[i] = ((i * 7919) % 1000) / 1000 (exact in float32, so the Rust test rebuilds it bit for bit).

Cases that should serve:
  lenet5    LeNet-5 (LeCun et al., 1998) as its layer table gives it, with full C3 connectivity
  arith     conv arithmetic: 5x5 no pad, 3x3 pad 1, 3x3 stride 2, three stacked 3x3, 2x2 pool
  nhwc      a small NHWC classifier (input [N, 64, 64, 3], transposed inside)
  batch1    a fixed batch of 1
  softmax   a graph ending in Softmax
  sigmoid   a graph ending in Sigmoid (multi-label scores)
  uint8     raw 8-bit pixels in, normalised inside the graph
Cases that must be refused (no reference): two_inputs, rank3, two_channels, four_channels,
  unknown_op, truncated, fixed_batch4,
  dynamic_hw (refused only when no size is configured).

Usage: .venv/bin/python tools/fixtures.py   (versions pinned in tools/requirements.txt)
"""

import json
import os

import numpy as np
import onnx
import onnxruntime
from onnx import TensorProto, helper, numpy_helper

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
OUT = os.path.join(ROOT, "tests", "fixtures")
RNG = np.random.default_rng(7)


class Net:
    """A tiny builder: a chain of layers with He-scaled random weights."""

    def __init__(self, name, in_shape, layout="nchw"):
        self.name, self.nodes, self.inits = name, [], []
        self.cur, self.n = "input", 0
        self.in_shape = in_shape

    def _w(self, shape, fan_in):
        return (RNG.normal(0, np.sqrt(2.0 / fan_in), shape)).astype(np.float32)

    def _add(self, op, inputs, name=None, **attrs):
        self.n += 1
        out = name or f"{op.lower()}{self.n}"
        self.nodes.append(helper.make_node(op, inputs, [out], name=out, **attrs))
        self.cur = out
        return out

    def conv(self, cin, cout, k, stride=1, pad=0, relu=True):
        w, b = f"w{self.n + 1}", f"b{self.n + 1}"
        self.inits += [numpy_helper.from_array(self._w((cout, cin, k, k), cin * k * k), w),
                       numpy_helper.from_array(np.zeros(cout, np.float32) + 0.01, b)]
        self._add("Conv", [self.cur, w, b], kernel_shape=[k, k], strides=[stride, stride], pads=[pad] * 4)
        if relu:
            self._add("Relu", [self.cur])

    def pool(self, op="MaxPool", k=2, s=2):
        self._add(op, [self.cur], kernel_shape=[k, k], strides=[s, s])

    def flatten(self):
        self._add("Flatten", [self.cur], axis=1)

    def fc(self, k, n, relu=True, name=None):
        w, b = f"w{self.n + 1}", f"b{self.n + 1}"
        self.inits += [numpy_helper.from_array(self._w((n, k), k), w), numpy_helper.from_array(np.zeros(n, np.float32), b)]
        self._add("Gemm", [self.cur, w, b], name=name, transB=1)
        if relu:
            self._add("Relu", [self.cur])

    def model(self, classes, out_name="scores", batch="N", inputs=None):
        # rename the last tensor to out_name
        last = self.nodes[-1]
        last.output[0] = out_name
        shape = [batch] + list(self.in_shape)
        graph = helper.make_graph(
            self.nodes,
            self.name,
            inputs or [helper.make_tensor_value_info("input", TensorProto.FLOAT, shape)],
            [helper.make_tensor_value_info(out_name, TensorProto.FLOAT, [batch, classes])],
            self.inits,
        )
        m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)], producer_name="lineside-tools-fixtures")
        return m


def lenet5():
    # LeCun et al. 1998, Fig. 2: 32x32 input; C1 6@28x28 (5x5); S2 6@14x14; C3 16@10x10 (5x5);
    # S4 16@5x5; C5 120 (5x5 conv to 1x1); F6 84; output 10. Full C3 connectivity here.
    n = Net("lenet5", [1, 32, 32])
    n.conv(1, 6, 5, relu=False)
    n._add("Tanh", [n.cur])
    n.pool("AveragePool")
    n.conv(6, 16, 5, relu=False)
    n._add("Tanh", [n.cur])
    n.pool("AveragePool")
    n.conv(16, 120, 5, relu=False)
    n._add("Tanh", [n.cur])
    n.flatten()
    n.fc(120, 84, relu=False)
    n._add("Tanh", [n.cur])
    n.fc(84, 10, relu=False)
    return n.model(10), 10, (1, 32, 32)


def arith():
    n = Net("arith", [3, 32, 32])
    n.conv(3, 4, 5)  # 32 -> 28 (no padding)
    n.conv(4, 4, 3, pad=1)  # 28 -> 28 (padding (F-1)/2 keeps the size)
    n.conv(4, 4, 3, stride=2, pad=1)  # floor((28 - 3 + 2) / 2) + 1 = 14
    n.pool()  # 14 -> 7
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(4, 3, relu=False)
    return n.model(3), 3, (3, 32, 32)


def stacked3x3():
    n = Net("stacked3x3", [3, 16, 16])
    for _ in range(3):
        n.conv(3 if not n.nodes else 4, 4, 3, pad=1)
    n._add("GlobalMaxPool", [n.cur])
    n.flatten()
    n.fc(4, 2, relu=False)
    return n.model(2), 2, (3, 16, 16)


def nhwc():
    n = Net("nhwc", [64, 64, 3])
    n._add("Transpose", ["input"], perm=[0, 3, 1, 2])
    n.conv(3, 8, 3, pad=1)
    n.pool()
    n.conv(8, 8, 3, pad=1)
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(8, 4, relu=False)
    return n.model(4), 4, (64, 64, 3)


def batch1():
    m, k, s = arith()
    m.graph.input[0].type.tensor_type.shape.dim[0].dim_value = 1
    m.graph.output[0].type.tensor_type.shape.dim[0].dim_value = 1
    return m, k, s


def softmax():
    n = Net("softmax", [3, 32, 32])
    n.conv(3, 4, 3, stride=2, pad=1)
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(4, 3, relu=False)
    n._add("Softmax", [n.cur], axis=1)
    return n.model(3), 3, (3, 32, 32)


def reference_input(shape, uint8=False):
    count = int(np.prod(shape))
    i = np.arange(count, dtype=np.int64)
    if uint8:
        return ((i * 7919) % 256).astype(np.uint8).reshape((1,) + tuple(shape))
    return (((i * 7919) % 1000) / 1000.0).astype(np.float32).reshape((1,) + tuple(shape))


def uint8():
    # Raw 8-bit pixels in; the graph normalises (Cast, Div 255) before its convolutions.
    n = Net("uint8", [3, 32, 32])
    n._add("Cast", ["input"], to=TensorProto.FLOAT)
    n.inits.append(numpy_helper.from_array(np.array(255.0, np.float32), "k255"))
    n._add("Div", [n.cur, "k255"])
    n.conv(3, 4, 3, stride=2, pad=1)
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(4, 3, relu=False)
    m = n.model(3)
    m.graph.input[0].type.tensor_type.elem_type = TensorProto.UINT8
    return m, 3, (3, 32, 32)


def sigmoid():
    n = Net("sigmoid", [3, 32, 32])
    n.conv(3, 4, 3, stride=2, pad=1)
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(4, 3, relu=False)
    n._add("Sigmoid", [n.cur])
    return n.model(3), 3, (3, 32, 32)


def write(case, model, classes, shape, reference=True):
    d = os.path.join(OUT, case)
    os.makedirs(d, exist_ok=True)
    onnx.checker.check_model(model)
    path = os.path.join(d, "model.onnx")
    onnx.save(model, path)
    with open(os.path.join(d, "classes.txt"), "w") as f:
        f.write("".join(f"class{i}\n" for i in range(classes)))
    if reference:
        sess = onnxruntime.InferenceSession(path, providers=["CPUExecutionProvider"])
        x = reference_input(shape, uint8=model.graph.input[0].type.tensor_type.elem_type == TensorProto.UINT8)
        out = sess.run(None, {sess.get_inputs()[0].name: x})[0]
        doc = {
            "source": f"onnxruntime {onnxruntime.__version__} (PyPI, CPUExecutionProvider), raw outputs",
            "input": "uint8 x[i] = (i * 7919) % 256, batch 1" if x.dtype == np.uint8 else "x[i] = ((i * 7919) % 1000) / 1000, float32, batch 1",
            "input_shape": [1] + list(shape),
            "outputs": [float(v) for v in out.reshape(-1)],
        }
        with open(os.path.join(d, "reference.json"), "w") as f:
            json.dump(doc, f, indent=2)
            f.write("\n")


def main():
    for case, build in [("lenet5", lenet5), ("arith", arith), ("stacked3x3", stacked3x3), ("nhwc", nhwc),
                        ("batch1", batch1), ("softmax", softmax), ("uint8", uint8), ("sigmoid", sigmoid)]:
        write(case, *build())

    # --- refusals
    m, k, s = arith()
    m.graph.input.append(helper.make_tensor_value_info("mask", TensorProto.FLOAT, ["N", 3, 32, 32]))
    m.graph.node[0].input[0] = "input"
    m.graph.node.insert(0, helper.make_node("Add", ["input", "mask"], ["sum0"], name="sum0"))
    m.graph.node[1].input[0] = "sum0"
    write("two_inputs", m, k, s, reference=False)

    n = Net("rank3", [32, 32])
    n.flatten()
    n.fc(1024, 3, relu=False)
    write("rank3", n.model(3), 3, (32, 32), reference=False)

    for case, c in [("two_channels", 2), ("four_channels", 4)]:
        n = Net(case, [c, 16, 16])
        n.conv(c, 4, 3)
        n._add("GlobalAveragePool", [n.cur])
        n.flatten()
        n.fc(4, 3, relu=False)
        write(case, n.model(3), 3, (c, 16, 16), reference=False)

    n = Net("unknown_op", [3, 16, 16])
    n.conv(3, 4, 3)
    n.nodes.append(helper.make_node("FrobnicateRegion", [n.cur], ["frob"], name="frob_1", domain="com.example"))
    n.cur = "frob"
    n._add("GlobalAveragePool", [n.cur])
    n.flatten()
    n.fc(4, 3, relu=False)
    m = n.model(3)
    m.opset_import.append(helper.make_opsetid("com.example", 1))
    d = os.path.join(OUT, "unknown_op")
    os.makedirs(d, exist_ok=True)
    onnx.save(m, os.path.join(d, "model.onnx"))  # the checker would refuse the custom op
    with open(os.path.join(d, "classes.txt"), "w") as f:
        f.write("a\nb\nc\n")

    m, k, s = arith()
    m.graph.input[0].type.tensor_type.shape.dim[0].dim_value = 4
    m.graph.output[0].type.tensor_type.shape.dim[0].dim_value = 4
    write("fixed_batch4", m, k, s, reference=False)

    m, k, s = arith()
    for i, sym in [(2, "H"), (3, "W")]:
        m.graph.input[0].type.tensor_type.shape.dim[i].dim_param = sym
    write("dynamic_hw", m, k, s, reference=False)

    good = open(os.path.join(OUT, "arith", "model.onnx"), "rb").read()
    d = os.path.join(OUT, "truncated")
    os.makedirs(d, exist_ok=True)
    open(os.path.join(d, "model.onnx"), "wb").write(good[: len(good) // 2])
    with open(os.path.join(d, "classes.txt"), "w") as f:
        f.write("a\nb\nc\n")
    print("fixtures written to", os.path.relpath(OUT, ROOT))


if __name__ == "__main__":
    main()
