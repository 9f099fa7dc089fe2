#!/usr/bin/env python3
"""Render the washer-line demo frames, train a small CNN on them and export it to ONNX.

The scenario is invented for the demo: a camera looks down on flat steel washers on a dark
belt. Five classes, in this order: good, cracked (a dark line across the ring), burr (a bright
spur on the outer edge), no_hole (a solid disc), empty (belt only).

Everything is deterministic from --seed: the frames come from numpy's PCG64 stream, the
trainer is plain numpy (im2col convolutions, Adam), and BLAS runs on one thread so that the
float reductions happen in the same order on every run. Package versions are pinned in
tools/requirements.txt.

The serving pipeline this model expects is lineside's built-in washer default:
stretch 320x240 -> 96x96 with an antialiased bilinear filter (Pillow's BILINEAR), RGB,
x = pixel / 255, NCHW float32.

It writes samples/expected.json with labels only; `lineside check --write-expected` then adds
the scores lineside computes, which the self-test checks at every load.

Usage:
    .venv/bin/python tools/washers.py --out models/washers          # ~15 min on 2 cores
    .venv/bin/python tools/washers.py --out /tmp/w --eval-only       # re-measure accuracy
"""

import argparse
import json
import os
import sys
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # deterministic reductions
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from PIL import Image, ImageFilter  # noqa: E402

CLASSES = ["good", "cracked", "burr", "no_hole", "empty"]
FRAME_W, FRAME_H = 320, 240
IN_W, IN_H = 96, 96


# --------------------------------------------------------------------------- rendering


def render(rng: np.random.Generator, label: str) -> np.ndarray:
    """One 320x240 RGB frame of the given class, as uint8 HxWx3."""
    yy, xx = np.mgrid[0:FRAME_H, 0:FRAME_W].astype(np.float32)

    # Dark belt: base level, a lighting gradient, lengthwise grain.
    base = rng.uniform(22, 55)
    gdir = rng.uniform(0, 2 * np.pi)
    grad = rng.uniform(0, 18) * (np.cos(gdir) * (xx / FRAME_W - 0.5) + np.sin(gdir) * (yy / FRAME_H - 0.5))
    grain = rng.normal(0, 1, size=(FRAME_H, 1)).astype(np.float32) * rng.uniform(1, 4)
    belt = base + grad + grain
    tint = np.array([1.0, rng.uniform(0.95, 1.05), rng.uniform(0.95, 1.1)], np.float32)
    img = belt[..., None] * tint

    if label != "empty":
        R = rng.uniform(52, 80)
        cx = rng.uniform(R + 6, FRAME_W - R - 6)
        cy = rng.uniform(R + 6, FRAME_H - R - 6)
        squash = rng.uniform(0.92, 1.08)  # slight camera tilt
        rot = rng.uniform(0, 2 * np.pi)
        dx, dy = xx - cx, yy - cy
        # rotate into the washer's frame, squash one axis
        u = np.cos(rot) * dx + np.sin(rot) * dy
        v = (-np.sin(rot) * dx + np.cos(rot) * dy) * squash
        d = np.sqrt(u * u + v * v)
        ang = np.arctan2(v, u)
        r = 0.0 if label == "no_hole" else R * rng.uniform(0.36, 0.52)
        cover = np.clip(R - d + 0.5, 0, 1)
        if r > 0:
            cover = cover * np.clip(d - r + 0.5, 0, 1)

        # Steel: bright, with a directional highlight and radial brushing.
        steel = rng.uniform(135, 200)
        light = rng.uniform(0, 2 * np.pi)
        shade = steel * (1 + 0.18 * np.cos(ang - light)) + 6 * np.sin(d * rng.uniform(0.5, 1.2))
        metal = shade[..., None] * np.array([1.0, 1.0, rng.uniform(1.0, 1.08)], np.float32)

        if label == "burr":
            phi = rng.uniform(0, 2 * np.pi)
            t = np.cos(phi) * u + np.sin(phi) * v  # along the spur
            p = -np.sin(phi) * u + np.cos(phi) * v  # across it
            length = rng.uniform(16, 28)
            half = rng.uniform(5.0, 8.0)
            width = half * (1 - (t - R + 2) / length)  # tapers to a point at R + length
            spur = np.clip(width - np.abs(p) + 0.5, 0, 1) * (t > R - 3) * (width > 0)
            cover = np.maximum(cover, spur)
            bright = rng.uniform(225, 255)
            metal = metal * (1 - spur[..., None]) + bright * spur[..., None]

        img = img * (1 - cover[..., None]) + metal * cover[..., None]

        if label == "cracked":
            th = rng.uniform(0, 2 * np.pi)
            t = np.cos(th) * u + np.sin(th) * v
            p = -np.sin(th) * u + np.cos(th) * v
            p = p + 1.2 * np.sin(t * rng.uniform(0.3, 0.7))  # a little jagged
            w = rng.uniform(2.5, 4.5)
            crack = np.clip(w - np.abs(p) + 0.5, 0, 1) * (t > r - 1) * (t < R + 1)
            crack = crack * cover
            dark = rng.uniform(15, 50)
            img = img * (1 - crack[..., None]) + dark * crack[..., None]

    # Distractors on the belt: a few specks of dust or oil.
    for _ in range(rng.integers(0, 4)):
        sx, sy = rng.uniform(0, FRAME_W), rng.uniform(0, FRAME_H)
        sr = rng.uniform(1, 3)
        speck = np.clip(sr - np.sqrt((xx - sx) ** 2 + (yy - sy) ** 2) + 0.5, 0, 1)
        img = img + speck[..., None] * rng.uniform(-15, 25)

    img = img * rng.uniform(0.75, 1.25)  # exposure
    frame = Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    sigma = rng.uniform(0, 1.6)
    if sigma > 0.2:
        frame = frame.filter(ImageFilter.GaussianBlur(sigma))
    arr = np.asarray(frame).astype(np.float32)
    arr = arr + rng.normal(0, rng.uniform(1.5, 7), size=arr.shape)  # sensor noise
    return np.clip(np.round(arr), 0, 255).astype(np.uint8)


def preprocess(frame: np.ndarray) -> np.ndarray:
    """lineside's washer preprocessing, done with Pillow: 3x96x96 float32 in [0, 1]."""
    small = Image.fromarray(frame).resize((IN_W, IN_H), Image.BILINEAR)
    return (np.asarray(small, np.float32) / 255.0).transpose(2, 0, 1)


def dataset(rng, per_class):
    xs, ys = [], []
    for _ in range(per_class):
        for k, name in enumerate(CLASSES):
            xs.append(preprocess(render(rng, name)))
            ys.append(k)
    return np.stack(xs), np.array(ys)


# --------------------------------------------------------------------------- the network

CONVS = [(3, 8), (8, 16), (16, 32), (32, 32)]  # 3x3, pad 1, each followed by ReLU + 2x2 max pool
HIDDEN = 64


def init_params(rng):
    p = {}
    for i, (cin, cout) in enumerate(CONVS):
        p[f"c{i}w"] = (rng.normal(0, np.sqrt(2 / (cin * 9)), (cout, cin, 3, 3))).astype(np.float32)
        p[f"c{i}b"] = np.zeros(cout, np.float32)
    flat = CONVS[-1][1] * (IN_H // 16) * (IN_W // 16)
    p["f0w"] = rng.normal(0, np.sqrt(2 / flat), (HIDDEN, flat)).astype(np.float32)
    p["f0b"] = np.zeros(HIDDEN, np.float32)
    p["f1w"] = rng.normal(0, np.sqrt(1 / HIDDEN), (len(CLASSES), HIDDEN)).astype(np.float32)
    p["f1b"] = np.zeros(len(CLASSES), np.float32)
    return p


def im2col(x):
    """N,C,H,W -> (N*H*W, C*9) for a 3x3 convolution with padding 1."""
    n, c, h, w = x.shape
    xp = np.pad(x, ((0, 0), (0, 0), (1, 1), (1, 1)))
    win = np.lib.stride_tricks.sliding_window_view(xp, (3, 3), axis=(2, 3))  # N,C,H,W,3,3
    return np.ascontiguousarray(win.transpose(0, 2, 3, 1, 4, 5)).reshape(n * h * w, c * 9)


def col2im(dcols, shape):
    n, c, h, w = shape
    d = dcols.reshape(n, h, w, c, 3, 3)
    dxp = np.zeros((n, c, h + 2, w + 2), np.float32)
    for i in range(3):
        for j in range(3):
            dxp[:, :, i : i + h, j : j + w] += d[:, :, :, :, i, j].transpose(0, 3, 1, 2)
    return dxp[:, :, 1:-1, 1:-1]


def forward(p, x, keep=False):
    cache = []
    for i in range(len(CONVS)):
        n, c, h, w = x.shape
        wmat = p[f"c{i}w"].reshape(p[f"c{i}w"].shape[0], -1)
        cols = im2col(x)
        y = cols @ wmat.T + p[f"c{i}b"]
        y = y.reshape(n, h, w, -1).transpose(0, 3, 1, 2)
        a = np.maximum(y, 0)
        f = a.shape[1]
        blocks = a.reshape(n, f, h // 2, 2, w // 2, 2)
        pooled = blocks.max(axis=(3, 5))
        if keep:
            cache.append((x.shape, cols, y, blocks, pooled))
        x = pooled
    flat = x.reshape(x.shape[0], -1)
    h1 = flat @ p["f0w"].T + p["f0b"]
    a1 = np.maximum(h1, 0)
    logits = a1 @ p["f1w"].T + p["f1b"]
    if keep:
        return logits, (cache, flat, h1, a1)
    return logits


def backward(p, caches, dlogits):
    cache, flat, h1, a1 = caches
    g = {}
    g["f1w"] = dlogits.T @ a1
    g["f1b"] = dlogits.sum(0)
    da1 = dlogits @ p["f1w"]
    dh1 = da1 * (h1 > 0)
    g["f0w"] = dh1.T @ flat
    g["f0b"] = dh1.sum(0)
    dx = (dh1 @ p["f0w"]).reshape(cache[-1][4].shape)
    for i in reversed(range(len(CONVS))):
        xshape, cols, y, blocks, pooled = cache[i]
        n, f, h2, w2 = pooled.shape
        # ties (all-zero ReLU blocks) pass the gradient to every tied input; their ReLU
        # derivative is zero anyway, so this changes nothing in practice
        mask = blocks == pooled[:, :, :, None, :, None]
        da = (mask * dx[:, :, :, None, :, None]).reshape(n, f, h2 * 2, w2 * 2)
        dy = da * (y > 0)
        dyf = dy.transpose(0, 2, 3, 1).reshape(-1, f)
        g[f"c{i}w"] = (cols.T @ dyf).T.reshape(p[f"c{i}w"].shape)  # this order is ~8x faster in BLAS
        g[f"c{i}b"] = dyf.sum(0)
        if i > 0:
            dx = col2im(dyf @ p[f"c{i}w"].reshape(f, -1), xshape)
    return g


def softmax(z):
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def train(p, x, y, rng, epochs, batch, lr):
    m = {k: np.zeros_like(v) for k, v in p.items()}
    v = {k: np.zeros_like(v) for k, v in p.items()}
    b1, b2, eps, step = 0.9, 0.999, 1e-8, 0
    total_steps = epochs * (len(x) // batch)
    for ep in range(epochs):
        order = rng.permutation(len(x))
        t0, loss_sum, hits = time.time(), 0.0, 0
        for s in range(len(x) // batch):
            idx = order[s * batch : (s + 1) * batch]
            xb, yb = x[idx], y[idx]
            if rng.random() < 0.5:  # flips keep the classes: washers have no handedness
                xb = xb[:, :, :, ::-1]
            if rng.random() < 0.5:
                xb = xb[:, :, ::-1, :]
            logits, caches = forward(p, np.ascontiguousarray(xb), keep=True)
            prob = softmax(logits)
            loss_sum += -np.log(prob[np.arange(batch), yb] + 1e-12).sum()
            hits += (prob.argmax(1) == yb).sum()
            dlogits = prob
            dlogits[np.arange(batch), yb] -= 1
            dlogits /= batch
            g = backward(p, caches, dlogits.astype(np.float32))
            step += 1
            rate = lr * 0.5 * (1 + np.cos(np.pi * step / total_steps))  # cosine decay
            for k in p:
                m[k] = b1 * m[k] + (1 - b1) * g[k]
                v[k] = b2 * v[k] + (1 - b2) * g[k] * g[k]
                mh = m[k] / (1 - b1**step)
                vh = v[k] / (1 - b2**step)
                p[k] = (p[k] - rate * mh / (np.sqrt(vh) + eps)).astype(np.float32)
        n = (len(x) // batch) * batch
        print(f"epoch {ep + 1}/{epochs}: loss {loss_sum / n:.4f}, train acc {hits / n:.4f}, {time.time() - t0:.0f}s", flush=True)


def accuracy(p, x, y):
    pred = np.concatenate([forward(p, x[i : i + 256]).argmax(1) for i in range(0, len(x), 256)])
    return float((pred == y).mean()), pred


# --------------------------------------------------------------------------- export


def export_onnx(p, path):
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    nodes, inits = [], []
    prev = "frame"
    for i in range(len(CONVS)):
        inits += [numpy_helper.from_array(p[f"c{i}w"], f"conv{i}.weight"), numpy_helper.from_array(p[f"c{i}b"], f"conv{i}.bias")]
        nodes.append(helper.make_node("Conv", [prev, f"conv{i}.weight", f"conv{i}.bias"], [f"conv{i}"], name=f"conv{i}", kernel_shape=[3, 3], pads=[1, 1, 1, 1]))
        nodes.append(helper.make_node("Relu", [f"conv{i}"], [f"relu{i}"], name=f"relu{i}"))
        nodes.append(helper.make_node("MaxPool", [f"relu{i}"], [f"pool{i}"], name=f"pool{i}", kernel_shape=[2, 2], strides=[2, 2]))
        prev = f"pool{i}"
    nodes.append(helper.make_node("Flatten", [prev], ["flat"], name="flatten", axis=1))
    inits += [numpy_helper.from_array(p["f0w"], "fc0.weight"), numpy_helper.from_array(p["f0b"], "fc0.bias")]
    nodes.append(helper.make_node("Gemm", ["flat", "fc0.weight", "fc0.bias"], ["fc0"], name="fc0", transB=1))
    nodes.append(helper.make_node("Relu", ["fc0"], ["fc0_relu"], name="fc0_relu"))
    inits += [numpy_helper.from_array(p["f1w"], "fc1.weight"), numpy_helper.from_array(p["f1b"], "fc1.bias")]
    nodes.append(helper.make_node("Gemm", ["fc0_relu", "fc1.weight", "fc1.bias"], ["logits"], name="fc1", transB=1))
    graph = helper.make_graph(
        nodes,
        "washers",
        [helper.make_tensor_value_info("frame", TensorProto.FLOAT, ["N", 3, IN_H, IN_W])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", len(CLASSES)])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)], producer_name="lineside-tools-washers")
    model.doc_string = "Washer-line demo classifier (invented data, demo only). Classes: " + ", ".join(CLASSES)
    onnx.checker.check_model(model, full_check=True)
    onnx.save(model, path)


def write_samples(p, rng, out, per_class):
    """Render sample frames for the bundle, `per_class` a class, each one the model gets right.

    The samples demonstrate the server and anchor its tests; a frame the model misclassifies
    is skipped (and counted in training.json) rather than committed with a wrong expectation.
    Accuracy is measured on the separate held-out set, never on these.
    """
    expected, skipped = {}, 0
    for name in CLASSES:
        kept = 0
        while kept < per_class:
            frame = render(rng, name)
            if CLASSES[int(forward(p, preprocess(frame)[None]).argmax())] != name:
                skipped += 1
                continue
            kept += 1
            fname = f"{name}-{kept:02d}.png"
            Image.fromarray(frame).save(os.path.join(out, "samples", fname), optimize=True)
            expected[fname] = {"label": name}
    with open(os.path.join(out, "samples", "expected.json"), "w") as f:
        json.dump(expected, f, indent=2, sort_keys=True)
        f.write("\n")
    return skipped


def params_from_onnx(path):
    import onnx
    from onnx import numpy_helper

    names = {f"conv{i}.{k}": f"c{i}{k[0]}" for i in range(len(CONVS)) for k in ("weight", "bias")}
    names.update({f"fc{i}.{k}": f"f{i}{k[0]}" for i in range(2) for k in ("weight", "bias")})
    return {names[t.name]: numpy_helper.to_array(t) for t in onnx.load(path).graph.initializer}


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--out", required=True, help="bundle directory to write (classifier.onnx, classes.txt, samples/)")
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--per-class", type=int, default=800, help="training frames per class")
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--holdout", type=int, default=400, help="fresh held-out frames per class")
    ap.add_argument("--samples", type=int, default=3, help="sample frames per class in the bundle")
    ap.add_argument("--eval-only", action="store_true", help="read OUT/classifier.onnx and re-measure held-out accuracy")
    ap.add_argument("--write-samples", action="store_true", help="with --eval-only: rewrite OUT/samples from the model")
    args = ap.parse_args()
    os.makedirs(os.path.join(args.out, "samples"), exist_ok=True)

    # Separate streams so that changing one set's size does not change the others.
    seeds = np.random.SeedSequence(args.seed).spawn(4)
    train_rng, hold_rng, sample_rng, init_rng = (np.random.default_rng(s) for s in seeds)

    if args.eval_only:
        p = params_from_onnx(os.path.join(args.out, "classifier.onnx"))
    else:
        t0 = time.time()
        x, y = dataset(train_rng, args.per_class)
        print(f"rendered {len(x)} training frames in {time.time() - t0:.0f}s", flush=True)
        p = init_params(init_rng)
        train(p, x, y, init_rng, args.epochs, batch=32, lr=2e-3)

    hx, hy = dataset(hold_rng, args.holdout)
    acc, pred = accuracy(p, hx, hy)
    confusion = np.zeros((len(CLASSES), len(CLASSES)), int)
    for t, q in zip(hy, pred):
        confusion[t, q] += 1
    print(f"held-out accuracy on {len(hx)} fresh frames: {acc:.4f}")
    print("confusion (rows = truth):", CLASSES)
    print(confusion)
    if args.eval_only:
        if args.write_samples:
            skipped = write_samples(p, sample_rng, args.out, args.samples)
            print(f"wrote samples; skipped {skipped} misclassified frames")
            report_path = os.path.join(args.out, "training.json")
            if os.path.exists(report_path):
                report = json.load(open(report_path))
                report.update(samples_per_class=args.samples, samples_skipped_as_misclassified=skipped)
                with open(report_path, "w") as f:
                    json.dump(report, f, indent=2)
                    f.write("\n")
        return

    export_onnx(p, os.path.join(args.out, "classifier.onnx"))
    with open(os.path.join(args.out, "classes.txt"), "w") as f:
        f.write("\n".join(CLASSES) + "\n")

    skipped = write_samples(p, sample_rng, args.out, args.samples)
    report = {
        "seed": args.seed,
        "training_frames": args.per_class * len(CLASSES),
        "epochs": args.epochs,
        "holdout_frames": int(len(hx)),
        "holdout_accuracy": acc,
        "confusion_rows_truth": confusion.tolist(),
        "classes": CLASSES,
        "samples_per_class": args.samples,
        "samples_skipped_as_misclassified": skipped,
    }
    with open(os.path.join(args.out, "training.json"), "w") as f:
        json.dump(report, f, indent=2)
        f.write("\n")


if __name__ == "__main__":
    main()
