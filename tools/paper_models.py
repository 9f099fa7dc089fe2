#!/usr/bin/env python3
"""Build ResNet-18, MobileNetV2, SqueezeNet 1.1 and a small VGG-style net from their layer
tables, with seeded random weights.

Too large to commit (45 MB and 14 MB), so the tests build them at test time into the folder
given by --out (deterministic: numpy PCG64, seed 11, versions pinned in
tools/requirements.txt). With --reference, also write onnxruntime's logits for the fixed input
x[i] = ((i * 7919) % 1000) / 1000 to tests/fixtures/paper/reference.json (committed).

- ResNet-18: He et al., 2016, "Deep Residual Learning for Image Recognition", Table 1
  (18-layer column): 7x7/2 conv 64, 3x3/2 max pool, basic blocks [2, 2, 2, 2] at 64, 128,
  256, 512 channels, global average pool, 1000-way fc. Batch norm after every convolution
  (section 3.4), 1x1 projection shortcuts where the shape changes (option B).
- MobileNetV2: Sandler et al., 2018, "MobileNetV2: Inverted Residuals and Linear
  Bottlenecks", Table 2: 3x3/2 conv 32, bottlenecks (t, c, n, s) = (1,16,1,1) (6,24,2,2)
  (6,32,3,2) (6,64,4,2) (6,96,3,1) (6,160,3,2) (6,320,1,1), 1x1 conv 1280, global average
  pool, 1000-way classifier. Batch norm after every convolution; ReLU here stands in for
  ReLU6 (the counts do not change).

Usage: .venv/bin/python tools/paper_models.py --out target/paper-models [--reference]
"""

import argparse
import json
import os

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


class Graph:
    def __init__(self, seed):
        self.rng = np.random.default_rng(seed)
        self.nodes, self.inits, self.n = [], [], 0

    def name(self, kind):
        self.n += 1
        return f"{kind}{self.n}"

    def const(self, kind, arr):
        n = self.name(kind)
        self.inits.append(numpy_helper.from_array(arr.astype(np.float32), n))
        return n

    def conv(self, x, cin, cout, k, s=1, group=1, bn=True, relu=True):
        w = self.const("w", self.rng.normal(0, np.sqrt(2.0 / (cin // group * k * k)), (cout, cin // group, k, k)))
        out = self.name("conv")
        self.nodes.append(helper.make_node("Conv", [x, w], [out], name=out, kernel_shape=[k, k], strides=[s, s],
                                           pads=[k // 2] * 4, group=group))
        if bn:
            scale = self.const("gamma", self.rng.uniform(0.5, 1.0, cout))
            bias = self.const("beta", self.rng.normal(0, 0.05, cout))
            mean = self.const("mean", self.rng.normal(0, 0.05, cout))
            var = self.const("var", self.rng.uniform(0.8, 1.2, cout))
            b = self.name("bn")
            self.nodes.append(helper.make_node("BatchNormalization", [out, scale, bias, mean, var], [b], name=b))
            out = b
        if relu:
            out = self.relu(out)
        return out

    def relu(self, x):
        r = self.name("relu")
        self.nodes.append(helper.make_node("Relu", [x], [r], name=r))
        return r

    def add(self, a, b):
        o = self.name("add")
        self.nodes.append(helper.make_node("Add", [a, b], [o], name=o))
        return o

    classes = 1000

    def head(self, x, c, classes=1000):
        self.classes = classes
        g = self.name("gap")
        self.nodes.append(helper.make_node("GlobalAveragePool", [x], [g], name=g))
        f = self.name("flatten")
        self.nodes.append(helper.make_node("Flatten", [g], [f], name=f, axis=1))
        w = self.const("fcw", self.rng.normal(0, np.sqrt(1.0 / c), (classes, c)))
        b = self.const("fcb", np.zeros(classes))
        self.nodes.append(helper.make_node("Gemm", [f, w, b], ["logits"], name="fc", transB=1))

    def model(self, name, size=224):
        graph = helper.make_graph(
            self.nodes, name,
            [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, size, size])],
            [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", self.classes])],
            self.inits,
        )
        return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)], producer_name="lineside-tools-paper")


def resnet18():
    g = Graph(11)
    x = g.conv("image", 3, 64, 7, s=2)
    p = g.name("pool")
    g.nodes.append(helper.make_node("MaxPool", [x], [p], name=p, kernel_shape=[3, 3], strides=[2, 2], pads=[1] * 4))
    x, cin = p, 64
    for stage, cout in enumerate([64, 128, 256, 512]):
        for block in range(2):
            s = 2 if (stage > 0 and block == 0) else 1
            y = g.conv(x, cin, cout, 3, s=s)
            y = g.conv(y, cout, cout, 3, relu=False)
            short = g.conv(x, cin, cout, 1, s=s, relu=False) if (s != 1 or cin != cout) else x
            x = g.relu(g.add(y, short))
            cin = cout
    g.head(x, 512)
    return g.model("resnet18")


def mobilenetv2():
    g = Graph(12)
    x = g.conv("image", 3, 32, 3, s=2)
    cin = 32
    for t, c, n, s in [(1, 16, 1, 1), (6, 24, 2, 2), (6, 32, 3, 2), (6, 64, 4, 2), (6, 96, 3, 1), (6, 160, 3, 2), (6, 320, 1, 1)]:
        for i in range(n):
            stride = s if i == 0 else 1
            hidden = cin * t
            y = g.conv(x, cin, hidden, 1) if t != 1 else x
            y = g.conv(y, hidden, hidden, 3, s=stride, group=hidden)
            y = g.conv(y, hidden, c, 1, relu=False)  # linear bottleneck
            x = g.add(x, y) if (stride == 1 and cin == c) else y
            cin = c
    x = g.conv(x, cin, 1280, 1)
    g.head(x, 1280)
    return g.model("mobilenetv2")


def squeezenet11():
    # SqueezeNet 1.1 (Iandola et al., 2016, and the v1.1 revision in the authors' repository,
    # recalled from memory): 3x3/2 conv 64, fire modules (squeeze, expand1x1, expand3x3) =
    # (16,64,64) x2, (32,128,128) x2, (48,192,192) x2, (64,256,256) x2 with 3x3/2 max pools
    # (ceil mode) after conv1, fire3 and fire5; 1x1 conv to 1000 classes, ReLU, global average pool.
    g = Graph(13)

    def conv(x, cin, cout, k, s=1, pad=0):
        w = g.const("w", g.rng.normal(0, np.sqrt(2.0 / (cin * k * k)), (cout, cin, k, k)))
        b = g.const("b", np.zeros(cout) + 0.01)
        o = g.name("conv")
        g.nodes.append(helper.make_node("Conv", [x, w, b], [o], name=o, kernel_shape=[k, k], strides=[s, s], pads=[pad] * 4))
        return g.relu(o)

    def pool(x):
        o = g.name("pool")
        g.nodes.append(helper.make_node("MaxPool", [x], [o], name=o, kernel_shape=[3, 3], strides=[2, 2], ceil_mode=1))
        return o

    def fire(x, cin, sq, e1, e3):
        s = conv(x, cin, sq, 1)
        a, b = conv(s, sq, e1, 1), conv(s, sq, e3, 3, pad=1)
        o = g.name("concat")
        g.nodes.append(helper.make_node("Concat", [a, b], [o], name=o, axis=1))
        return o

    x = pool(conv("image", 3, 64, 3, s=2))
    x = fire(x, 64, 16, 64, 64)
    x = pool(fire(x, 128, 16, 64, 64))
    x = fire(x, 128, 32, 128, 128)
    x = pool(fire(x, 256, 32, 128, 128))
    x = fire(x, 256, 48, 192, 192)
    x = fire(x, 384, 48, 192, 192)
    x = fire(x, 384, 64, 256, 256)
    x = fire(x, 512, 64, 256, 256)
    x = conv(x, 512, 1000, 1)
    gap = g.name("gap")
    g.nodes.append(helper.make_node("GlobalAveragePool", [x], [gap], name=gap))
    g.nodes.append(helper.make_node("Flatten", [gap], ["logits"], name="flatten", axis=1))
    return g.model("squeezenet11")


def vgg_small():
    # A small VGG-style net (common practice: stacks of 3x3 conv + ReLU, 2x2 max pool halving
    # the size, channels doubling): 3 stages of two convs, 32 -> 64 -> 128 channels, then fc.
    g = Graph(14)
    x, cin = "image", 3
    for cout in [32, 64, 128]:
        for _ in range(2):
            x = g.conv(x, cin, cout, 3, bn=False)
            cin = cout
        p = g.name("pool")
        g.nodes.append(helper.make_node("MaxPool", [x], [p], name=p, kernel_shape=[2, 2], strides=[2, 2]))
        x = p
    g.head(x, 128, classes=10)
    return g.model("vgg_small", size=32)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", required=True)
    ap.add_argument("--reference", action="store_true")
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)
    ref = {}
    for name, build in [("resnet18", resnet18), ("mobilenetv2", mobilenetv2), ("squeezenet11", squeezenet11), ("vgg_small", vgg_small)]:
        path = os.path.join(args.out, f"{name}.onnx")
        m = build()
        onnx.checker.check_model(m)
        onnx.save(m, path)
        if args.reference:
            import onnxruntime

            sess = onnxruntime.InferenceSession(path, providers=["CPUExecutionProvider"])
            side = m.graph.input[0].type.tensor_type.shape.dim[2].dim_value
            i = np.arange(3 * side * side, dtype=np.int64)
            x = (((i * 7919) % 1000) / 1000.0).astype(np.float32).reshape(1, 3, side, side)
            out = sess.run(None, {"image": x})[0].reshape(-1)
            ref[name] = {"outputs": [float(v) for v in out]}
            ref["source"] = f"onnxruntime {onnxruntime.__version__} (PyPI, CPUExecutionProvider), raw logits"
    if args.reference:
        d = os.path.join(ROOT, "tests", "fixtures", "paper")
        os.makedirs(d, exist_ok=True)
        with open(os.path.join(d, "reference.json"), "w") as f:
            json.dump(ref, f)
            f.write("\n")
    print("built the paper models in", args.out)


if __name__ == "__main__":
    main()
