#!/usr/bin/env python3
"""Render the washer-line demo frames, train a small CNN on them and export it to ONNX.

The scenario is invented for the demo: a camera looks down on flat steel washers on a dark
belt. Five classes, in this order: good, cracked (a dark line across the ring), burr (a bright
spur on the outer edge), no_hole (a solid disc), empty (belt only).

Two variants (--variant), one a camera station of the same line:
  demo    the bundled models/washers: colour 320x240 frames, input [N, 3, 96, 96].
  mono64  station 2, a monochrome camera at the packing station: the same kind of frames,
          with a centring fixture (the washer within 20 px of the frame's centre), saved as
          8-bit gray PNGs (Pillow's convert("L")), input [N, 1, 64, 64], and a different
          evaluation transform. It exists so that a guide can walk "serve your own model" on a
          model whose preprocessing is not the built-in default; it trains in a few minutes.

The demo trains on frames of two spreads (see Spread): every other frame is a standard one
(the kind the held-out set, the samples and mono64 use), the rest come from TRAIN_WIDE:
smaller and fainter cracks (part of the way across the ring), short, thin and dull burrs,
brighter and darker exposure, a black-level shift, uneven illumination (a spot and a ramp),
more blur, washers running off the frame's edge. The held-out accuracy is measured on standard
frames only, so it stays comparable from one recipe to the next.

--eval-set DIR renders the demo's labelled evaluation set instead of training:
DIR/<class>/<class>-NNN.png (320x240 RGB PNGs like the samples, --eval-per-class of each class,
default 40) and DIR/eval-set.json, from --eval-seed (default 20261215), a stream of its own,
with EVAL_SPREAD: the wide variations above (the defect always inside the frame), without
sensor noise (it would make the PNGs ~6 times larger; see EVAL_SPREAD). Every frame rendered is
written; none is dropped for what a model makes of it. 200 frames are about 3.7 MB.

Everything is deterministic from --seed: the frames come from numpy's PCG64 stream, the
trainer is plain numpy (im2col convolutions, Adam), and BLAS runs on one thread so that the
float reductions happen in the same order on every run. Package versions are pinned in
tools/requirements.txt.

The serving pipeline the demo model expects is lineside's built-in washer default:
stretch 320x240 -> 96x96 with an antialiased bilinear filter (Pillow's BILINEAR), RGB,
x = pixel / 255, NCHW float32.

The mono64 model's evaluation transform (written to its training.json too): gray (convert("L"),
a no-op on its L frames); resize the short side to 72 with Pillow's BILINEAR, the long side
int(72 * long / short) (320x240 -> 96x72); the centre 64x64 at offsets round((new - 64) / 2)
(16, 4); x = (pixel / 255 - 0.5) / 0.25, NCHW float32. In lineside's [models.preprocess]:
width = 64, height = 64, resize = "crop", short_side = 72, filter = "bilinear",
channels = "gray", mean = [0.5], std = [0.25].

It writes samples/expected.json with labels only; `lineside check --write-expected` then adds
the scores lineside computes, which the self-test checks at every load.

Usage:
    .venv/bin/python tools/washers.py --out models/washers          # ~18 min on 2 cores
    .venv/bin/python tools/washers.py --out /tmp/w --eval-only       # re-measure accuracy
    .venv/bin/python tools/washers.py --variant mono64 --out /tmp/station2  # ~5 min on 2 cores
    .venv/bin/python tools/washers.py --variant mono64 --out /tmp/station2 --eval-only
    .venv/bin/python tools/washers.py --eval-set /tmp/washers-eval   # 200 labelled frames, ~20 s
"""

import argparse
import json
import os
import sys
import time
from dataclasses import dataclass, replace
from typing import Callable, Optional

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # deterministic reductions
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from PIL import Image, ImageFilter  # noqa: E402

CLASSES = ["good", "cracked", "burr", "no_hole", "empty"]
FRAME_W, FRAME_H = 320, 240
IN_W, IN_H = 96, 96


# --------------------------------------------------------------------------- rendering


@dataclass(frozen=True)
class Spread:
    """How widely render() varies a frame: the (low, high) of its uniform draws.

    The defaults are the standard renderer (the held-out set, the samples, mono64's frames).
    `extras` adds draws the standard renderer does not make (crack opacity and extent, black
    level, uneven illumination, defects kept inside the frame), so a default Spread leaves the
    random stream, and every frame drawn from it, exactly as it was.
    """

    exposure: tuple = (0.75, 1.25)  # gain on the whole frame
    blur: tuple = (0.0, 1.6)  # Gaussian radius, px at 320x240 (none below 0.2)
    noise: tuple = (1.5, 7.0)  # sensor noise sigma, grey levels
    margin: float = 6.0  # px between the washer's rim and the frame's edge; negative: it runs off
    crack_width: tuple = (2.5, 4.5)
    crack_dark: tuple = (15, 50)
    burr_length: tuple = (16, 28)
    burr_half: tuple = (5.0, 8.0)  # half-width at the spur's root
    burr_bright: tuple = (225, 255)
    extras: bool = False
    crack_opacity: tuple = (1.0, 1.0)  # 1: the crack is `dark`; less: a fainter line
    crack_extent: tuple = (1.0, 1.0)  # share of the ring's width it crosses, from either edge
    black: tuple = (0.0, 0.0)  # black-level offset, grey levels, added after the gain
    uneven: float = 0.0  # illumination: a spot and a ramp, each up to +-this share of the gain


STANDARD = Spread()

# The evaluation set's renderer (--eval-set): wider than STANDARD in every direction the brief of
# a line inspection asks about: smaller and fainter cracks and burrs, brighter and darker
# exposure, a black-level shift, uneven illumination, more blur, washers up to 16 px over the
# frame's edge (the defect itself always inside). The faintest defects are still meant to be
# visible to a person looking at the 320x240 frame: a crack at least 1.8 px wide and 45 % of
# the way to its dark level, a spur at least 8 px long (a labelling floor, not a measurement).
# No sensor noise: it dominates a PNG's size (STANDARD's 1.5-7 grey levels cost ~125 kB a frame,
# 0.5-1.5 still ~85 kB; none, ~16 kB, so 200 frames stay near 3 MB), and the 320x240 -> 96x96
# downscale averages most of it away. Its draws are still made, so the frames are the ones a
# noisy spread would render, less the noise.
EVAL_SPREAD = Spread(
    exposure=(0.55, 1.5),
    blur=(0.0, 2.2),
    noise=(0.0, 0.0),
    margin=-16.0,
    crack_width=(1.8, 4.5),
    crack_dark=(15, 60),
    burr_length=(8, 28),
    burr_half=(2.5, 8.0),
    burr_bright=(150, 255),
    extras=True,
    crack_opacity=(0.45, 1.0),
    crack_extent=(0.35, 1.0),
    black=(-12.0, 18.0),
    uneven=0.3,
)
EVAL_SEED, EVAL_PER_CLASS = 20261215, 40

# The demo's training renders every other frame with this spread (the rest with STANDARD): the
# defects as small and faint as EVAL_SPREAD's, the lighting and the position a little wider,
# STANDARD's sensor noise. On the evaluation set (eval seed 20261215, 120 defective frames),
# seed 20261201:
#   STANDARD frames only, 10 epochs: 31 escapes (defective -> good), 6 of 40 good rejected,
#     held-out 0.9875;
#   this spread, 16 epochs: 19 escapes (15 of 40 cracks, mostly short ones; 4 of 40 burrs),
#     6 of 40 good rejected, held-out 0.9900;
#   fainter still (cracks from 1.5 px and 40 % opacity, spurs from 7 px, blur to 2.4), 12
#     epochs: held-out 0.9385 (good and cracked confused); 25 escapes, 13 good rejected.
TRAIN_WIDE = replace(
    EVAL_SPREAD,
    exposure=(0.5, 1.55),
    noise=STANDARD.noise,
    margin=-20.0,
    burr_bright=(140, 255),
    crack_opacity=(0.5, 1.0),
    black=(-15.0, 20.0),
    uneven=0.35,
)


def _inside(points, pad=3.0):
    return all(pad <= x <= FRAME_W - 1 - pad and pad <= y <= FRAME_H - 1 - pad for x, y in points)


def render(rng: np.random.Generator, label: str, centred: Optional[float] = None, spread: Spread = STANDARD) -> np.ndarray:
    """One 320x240 RGB frame of the given class, as uint8 HxWx3.

    `centred`: the washer's centre lies within this many pixels of the frame's centre (a station
    with a centring fixture); None: anywhere `spread.margin` allows. Either way one draw a
    coordinate, so the stream of the other draws is the same. `spread`: see Spread.
    """
    s = spread
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
        if centred is None:
            cx = rng.uniform(R + s.margin, FRAME_W - R - s.margin)
            cy = rng.uniform(R + s.margin, FRAME_H - R - s.margin)
        else:
            cx = rng.uniform(FRAME_W / 2 - centred, FRAME_W / 2 + centred)
            cy = rng.uniform(FRAME_H / 2 - centred, FRAME_H / 2 + centred)
        squash = rng.uniform(0.92, 1.08)  # slight camera tilt
        rot = rng.uniform(0, 2 * np.pi)
        dx, dy = xx - cx, yy - cy
        # rotate into the washer's frame, squash one axis
        u = np.cos(rot) * dx + np.sin(rot) * dy
        v = (-np.sin(rot) * dx + np.cos(rot) * dy) * squash

        def at(t, across, angle):
            """Frame (x, y) of the washer-frame point `t` along and `across` across direction `angle`."""
            a, b = np.cos(angle) * t - np.sin(angle) * across, np.sin(angle) * t + np.cos(angle) * across
            b = b / squash
            return cx + np.cos(rot) * a - np.sin(rot) * b, cy + np.sin(rot) * a + np.cos(rot) * b
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
            length = rng.uniform(*s.burr_length)
            half = rng.uniform(*s.burr_half)
            # extras: turn the spur until its root and tip lie inside the frame (the washer may not)
            for _ in range(1000 if s.extras else 0):
                if _inside([at(R + length, 0, phi), at(R - 3, half, phi), at(R - 3, -half, phi)]):
                    break
                phi = rng.uniform(0, 2 * np.pi)
            t = np.cos(phi) * u + np.sin(phi) * v  # along the spur
            p = -np.sin(phi) * u + np.cos(phi) * v  # across it
            width = half * (1 - (t - R + 2) / length)  # tapers to a point at R + length
            spur = np.clip(width - np.abs(p) + 0.5, 0, 1) * (t > R - 3) * (width > 0)
            cover = np.maximum(cover, spur)
            bright = rng.uniform(*s.burr_bright)
            metal = metal * (1 - spur[..., None]) + bright * spur[..., None]

        img = img * (1 - cover[..., None]) + metal * cover[..., None]

        if label == "cracked":
            th = rng.uniform(0, 2 * np.pi)
            jag = rng.uniform(0.3, 0.7)
            w = rng.uniform(*s.crack_width)
            t0, t1 = r - 1, R + 1
            if s.extras:  # a fainter crack, part of the way across, from the hole or the rim
                opacity = rng.uniform(*s.crack_opacity)
                extent = rng.uniform(*s.crack_extent) * (R - r)
                if rng.random() < 0.5:
                    t1 = r + extent
                else:
                    t0 = R - extent
                for _ in range(1000):  # turn it until its ends lie inside the frame
                    if _inside([at(t0 + 1, 0, th), at(t1 - 1, 0, th)]):
                        break
                    th = rng.uniform(0, 2 * np.pi)
            t = np.cos(th) * u + np.sin(th) * v
            p = -np.sin(th) * u + np.cos(th) * v
            p = p + 1.2 * np.sin(t * jag)  # a little jagged
            crack = np.clip(w - np.abs(p) + 0.5, 0, 1) * (t > t0) * (t < t1)
            crack = crack * cover
            if s.extras:
                crack = crack * opacity
            dark = rng.uniform(*s.crack_dark)
            img = img * (1 - crack[..., None]) + dark * crack[..., None]

    # Distractors on the belt: a few specks of dust or oil.
    for _ in range(rng.integers(0, 4)):
        sx, sy = rng.uniform(0, FRAME_W), rng.uniform(0, FRAME_H)
        sr = rng.uniform(1, 3)
        speck = np.clip(sr - np.sqrt((xx - sx) ** 2 + (yy - sy) ** 2) + 0.5, 0, 1)
        img = img + speck[..., None] * rng.uniform(-15, 25)

    if s.extras and s.uneven > 0:  # uneven illumination: a spot of light (or shade) and a ramp
        sx, sy, size = rng.uniform(0, FRAME_W), rng.uniform(0, FRAME_H), rng.uniform(50, 200)
        spot = rng.uniform(-s.uneven, s.uneven) * np.exp(-((xx - sx) ** 2 + (yy - sy) ** 2) / (2 * size * size))
        rdir = rng.uniform(0, 2 * np.pi)
        ramp = rng.uniform(-s.uneven, s.uneven) * (np.cos(rdir) * (xx / FRAME_W - 0.5) + np.sin(rdir) * (yy / FRAME_H - 0.5))
        img = img * np.maximum(1 + spot + ramp, 0.2)[..., None]
    img = img * rng.uniform(*s.exposure)  # exposure
    if s.extras:
        img = img + rng.uniform(*s.black)
    frame = Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    sigma = rng.uniform(*s.blur)
    if sigma > 0.2:
        frame = frame.filter(ImageFilter.GaussianBlur(sigma))
    arr = np.asarray(frame).astype(np.float32)
    arr = arr + rng.normal(0, rng.uniform(*s.noise), size=arr.shape)  # sensor noise
    return np.clip(np.round(arr), 0, 255).astype(np.uint8)


def preprocess(frame: np.ndarray) -> np.ndarray:
    """lineside's washer preprocessing, done with Pillow: 3x96x96 float32 in [0, 1]."""
    small = Image.fromarray(frame).resize((IN_W, IN_H), Image.BILINEAR)
    return (np.asarray(small, np.float32) / 255.0).transpose(2, 0, 1)


def mono_camera(frame: np.ndarray) -> np.ndarray:
    """Station 2's frame: the rendered colour frame as 8-bit gray (Pillow's ITU-R 601 luma)."""
    return np.asarray(Image.fromarray(frame).convert("L"))


MONO_SHORT, MONO_CROP, MONO_MEAN, MONO_STD = 72, 64, 0.5, 0.25


def short_side_size(w: int, h: int, short_side: int) -> tuple:
    """(width, height) after resizing the short side to `short_side`, the long side truncated.

    Source: pytorch/vision, torchvision/transforms/functional.py, resize() with an int size
    (ow = size, oh = int(size * h / w) when w < h, else the mirror), read at commit 01175db.
    A model trained through that Resize saw exactly these sizes, so its server must use them.
    """
    if w <= h:
        return short_side, int(short_side * h / w)
    return int(short_side * w / h), short_side


def preprocess_mono64(frame: np.ndarray) -> np.ndarray:
    """Station 2's evaluation transform, done with Pillow: 1x64x64 float32, (x - 0.5) / 0.25."""
    img = Image.fromarray(frame).convert("L")  # a no-op on station-2 frames, kept for any other
    w, h = short_side_size(img.width, img.height, MONO_SHORT)
    img = img.resize((w, h), Image.BILINEAR)
    # Python's round (halves to even), as lineside's resize = "crop" computes the offsets too;
    # a 320x240 frame has no halves (32 and 8 pixels to split), so any rounding rule agrees.
    left, top = round((w - MONO_CROP) / 2), round((h - MONO_CROP) / 2)
    img = img.crop((left, top, left + MONO_CROP, top + MONO_CROP))
    x = (np.asarray(img, np.float32) / 255.0 - MONO_MEAN) / MONO_STD
    return x[None]


def dataset(rng, per_class, v, wide=None):
    """`per_class` frames of each class; with `wide`, every other round of classes rendered with it."""
    xs, ys = [], []
    for i in range(per_class):
        spread = wide if wide is not None and i % 2 == 1 else STANDARD
        for k, name in enumerate(CLASSES):
            xs.append(v.preprocess(v.camera(render(rng, name, v.centred, spread))))
            ys.append(k)
    return np.stack(xs), np.array(ys)


# --------------------------------------------------------------------------- the network

CONVS = [(3, 8), (8, 16), (16, 32), (32, 32)]  # 3x3, pad 1, each followed by ReLU + 2x2 max pool
HIDDEN = 64


@dataclass(frozen=True)
class Variant:
    """One camera station of the line: its frames, its evaluation transform, its network."""

    name: str
    camera: Callable  # rendered RGB frame -> the frame the station saves (and serves)
    preprocess: Callable  # station frame -> CxHxW float32, the evaluation transform
    convs: list
    in_h: int
    in_w: int
    graph: str
    doc: str
    # Defaults for --per-class, --epochs, --holdout: each variant's own training budget.
    per_class: int
    epochs: int
    holdout: int
    batch: int
    transpose: bool  # augment with transposes too (square inputs)
    # Written to training.json (None: nothing, which keeps the demo's report as it was).
    transform: Optional[dict] = None
    centred: Optional[float] = None  # see render()
    wide: Optional[Spread] = None  # training only: every other frame rendered with it (see dataset())

    @property
    def channels(self):
        return self.convs[0][0]


MONO_W, MONO_H = short_side_size(FRAME_W, FRAME_H, MONO_SHORT)  # 96x72
MONO64_TRANSFORM = {
    "steps": [
        "1. gray: Pillow's convert(\"L\") (ITU-R 601 luma; station-2 frames are already L)",
        f"2. resize so the short side becomes {MONO_SHORT} px with Pillow's BILINEAR (antialiased); "
        f"the long side is int({MONO_SHORT} * long / short): {FRAME_W}x{FRAME_H} -> {MONO_W}x{MONO_H}",
        f"3. centre crop {MONO_CROP}x{MONO_CROP} at offsets round((new - {MONO_CROP}) / 2), Python's round "
        f"(halves to even): left {round((MONO_W - MONO_CROP) / 2)}, top {round((MONO_H - MONO_CROP) / 2)} "
        f"for a {FRAME_W}x{FRAME_H} frame",
        f"4. x = (pixel / 255 - {MONO_MEAN}) / {MONO_STD}, float32, NCHW [N, 1, {MONO_CROP}, {MONO_CROP}]",
    ],
    "gray": True,
    "short_side": MONO_SHORT,
    "resize_filter": "bilinear",
    "crop": MONO_CROP,
    "divisor": 255.0,
    "mean": MONO_MEAN,
    "std": MONO_STD,
    "layout": "nchw",
}

VARIANTS = {
    "demo": Variant(
        name="demo",
        camera=lambda frame: frame,
        preprocess=preprocess,
        convs=CONVS,
        in_h=IN_H,
        in_w=IN_W,
        graph="washers",
        doc="Washer-line demo classifier (invented data, demo only).",
        per_class=800,
        epochs=16,
        holdout=400,
        batch=32,
        transpose=False,
        wide=TRAIN_WIDE,
    ),
    # Same layer family on one channel at 64x64, a fraction of the demo's work a frame; with
    # 1500 frames it renders and trains in ~5 min (7 min measured on 2 cores while a cargo test
    # ran beside it, 4.6 min of CPU; numpy runs on one thread),
    # which a guide can ask a reader to wait for. Batches of 16 and transposes on top of the
    # flips: the best held-out accuracy found for that time. Station 2 has a centring fixture
    # (the washer within 20 px of the frame's centre): the centre crop keeps only the middle
    # 213x213 of a 320x240 frame, and with washers anywhere on the belt, as at the demo's
    # station, the crop cut off burr spurs and cracks (a cut-off burr looks good) and held-out
    # accuracy stayed near 0.89. With the fixture: 0.9987 on 750 fresh frames (seed 20261201).
    "mono64": Variant(
        name="mono64",
        camera=mono_camera,
        preprocess=preprocess_mono64,
        convs=[(1, 8), (8, 16), (16, 32), (32, 32)],
        in_h=MONO_CROP,
        in_w=MONO_CROP,
        graph="washers-mono64",
        doc="Washer line station 2 (monochrome packing-station camera) classifier (invented data, demo only).",
        per_class=300,
        epochs=30,
        holdout=150,
        batch=16,
        transpose=True,
        transform=MONO64_TRANSFORM,
        centred=20.0,
    ),
}


def depth(p):
    """Conv blocks in a parameter set: the parameters say it, so one forward serves every variant."""
    return sum(1 for k in p if k[0] == "c" and k[-1] == "w")


def init_params(rng, v):
    p = {}
    for i, (cin, cout) in enumerate(v.convs):
        p[f"c{i}w"] = (rng.normal(0, np.sqrt(2 / (cin * 9)), (cout, cin, 3, 3))).astype(np.float32)
        p[f"c{i}b"] = np.zeros(cout, np.float32)
    shrink = 2 ** len(v.convs)  # each block halves both sides
    flat = v.convs[-1][1] * (v.in_h // shrink) * (v.in_w // shrink)
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
    for i in range(depth(p)):
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
    for i in reversed(range(len(cache))):
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


def train(p, x, y, rng, epochs, batch, lr, transpose=False):
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
            # A washer has no preferred axis either (square inputs only). Drawn only when asked,
            # so the demo's random stream stays as it was.
            if transpose and rng.random() < 0.5:
                xb = xb.transpose(0, 1, 3, 2)
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


def export_onnx(p, path, v):
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    nodes, inits = [], []
    prev = "frame"
    for i in range(len(v.convs)):
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
        v.graph,
        [helper.make_tensor_value_info("frame", TensorProto.FLOAT, ["N", v.channels, v.in_h, v.in_w])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", len(CLASSES)])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)], producer_name="lineside-tools-washers")
    model.doc_string = v.doc + " Classes: " + ", ".join(CLASSES)
    onnx.checker.check_model(model, full_check=True)
    onnx.save(model, path)


def write_samples(p, rng, out, per_class, v):
    """Render sample frames for the bundle, `per_class` a class, each one the model gets right.

    The samples demonstrate the server and anchor its tests; a frame the model misclassifies
    is skipped (and counted in training.json) rather than committed with a wrong expectation.
    Accuracy is measured on the separate held-out set, never on these.
    """
    expected, skipped = {}, 0
    for name in CLASSES:
        kept = misses = 0
        while kept < per_class:
            frame = v.camera(render(rng, name, v.centred))  # what the station saves: mono64's are gray (mode L)
            if CLASSES[int(forward(p, v.preprocess(frame)[None]).argmax())] != name:
                skipped += 1
                misses += 1
                if misses == 200:  # an undertrained model may never name a class: stop, not spin
                    sys.exit(f"the model got 200 {name} frames in a row wrong; train longer (--epochs)")
                continue
            kept += 1
            fname = f"{name}-{kept:02d}.png"
            Image.fromarray(frame).save(os.path.join(out, "samples", fname), optimize=True)
            expected[fname] = {"label": name}
    with open(os.path.join(out, "samples", "expected.json"), "w") as f:
        json.dump(expected, f, indent=2, sort_keys=True)
        f.write("\n")
    return skipped


def write_eval_set(out, seed, per_class):
    """The demo's labelled evaluation set: OUT/<class>/<class>-NNN.png, rendered with EVAL_SPREAD.

    Its own seed, its own stream (one frame of each class in turn, so a larger --eval-per-class
    keeps the first frames). Every frame rendered is written, whatever any model makes of it; the
    labels are the folders. OUT/eval-set.json records the seed, the sizes and the spread.
    """
    from dataclasses import asdict

    rng = np.random.default_rng(np.random.SeedSequence(seed))
    for name in CLASSES:
        os.makedirs(os.path.join(out, name), exist_ok=True)
    for i in range(per_class):
        for name in CLASSES:
            frame = render(rng, name, None, EVAL_SPREAD)
            Image.fromarray(frame).save(os.path.join(out, name, f"{name}-{i + 1:03d}.png"), optimize=True)
    with open(os.path.join(out, "eval-set.json"), "w") as f:
        json.dump({"seed": seed, "per_class": per_class, "classes": CLASSES,
                   "frames": f"{FRAME_W}x{FRAME_H} RGB PNG, <class>/<class>-NNN.png",
                   "spread": asdict(EVAL_SPREAD)}, f, indent=2)
        f.write("\n")


def params_from_onnx(path, v):
    import onnx
    from onnx import numpy_helper

    model = onnx.load(path)
    # A model of the other variant would fail deep in a matrix product; say which it is instead.
    dims = [d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim[1:]]
    if dims != [v.channels, v.in_h, v.in_w]:
        sys.exit(f"{path}: input [N, {', '.join(map(str, dims))}] is not the {v.name} variant's "
                 f"[N, {v.channels}, {v.in_h}, {v.in_w}]; pass the --variant it was exported with")
    names = {f"conv{i}.{k}": f"c{i}{k[0]}" for i in range(len(v.convs)) for k in ("weight", "bias")}
    names.update({f"fc{i}.{k}": f"f{i}{k[0]}" for i in range(2) for k in ("weight", "bias")})
    return {names[t.name]: numpy_helper.to_array(t) for t in model.graph.initializer}


def variant_report(v):
    """training.json entries that tell a reader how to serve a variant (none for the demo)."""
    if v.transform is None:
        return {}
    return {
        "variant": v.name,
        "frames": f"{FRAME_W}x{FRAME_H} " + ("8-bit gray PNG (mode L)" if v.channels == 1 else "RGB PNG"),
        "input": {"name": "frame", "shape": ["N", v.channels, v.in_h, v.in_w], "dtype": "float32"},
        "output": {"name": "logits", "shape": ["N", len(CLASSES)], "scores": "raw logits (softmax them)"},
        "evaluation_transform": v.transform,
    }


def wide_report(v, per_class):
    """training.json entries for a variant trained on wide frames too (held-out stays STANDARD)."""
    if v.wide is None:
        return {}
    from dataclasses import asdict

    return {"training_frames_wide": (per_class // 2) * len(CLASSES), "training_wide_spread": asdict(v.wide),
            "holdout_spread": "standard"}


def budget(key):
    """A default of every variant, for --help: "demo 800, mono64 300"."""
    return ", ".join(f"{name} {getattr(v, key)}" for name, v in VARIANTS.items())


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--out", help="bundle directory to write (classifier.onnx, classes.txt, samples/)")
    ap.add_argument("--variant", choices=sorted(VARIANTS), default="demo", help="camera station (see above; default demo)")
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--per-class", type=int, help="training frames per class (default: " + budget("per_class") + ")")
    ap.add_argument("--epochs", type=int, help="default: " + budget("epochs"))
    ap.add_argument("--holdout", type=int, help="fresh held-out frames per class (default: " + budget("holdout") + ")")
    ap.add_argument("--samples", type=int, default=3, help="sample frames per class in the bundle")
    ap.add_argument("--eval-only", action="store_true", help="read OUT/classifier.onnx and re-measure held-out accuracy")
    ap.add_argument("--write-samples", action="store_true", help="with --eval-only: rewrite OUT/samples from the model")
    ap.add_argument("--eval-set", metavar="DIR", help="render the demo's labelled evaluation set into DIR (no training)")
    ap.add_argument("--eval-seed", type=int, default=EVAL_SEED, help=f"its seed (default {EVAL_SEED})")
    ap.add_argument("--eval-per-class", type=int, default=EVAL_PER_CLASS, help=f"its frames per class (default {EVAL_PER_CLASS})")
    args = ap.parse_args()
    if args.eval_set:
        if args.variant != "demo":
            sys.exit("--eval-set renders the demo's colour frames; it has no --variant")
        t0 = time.time()
        write_eval_set(args.eval_set, args.eval_seed, args.eval_per_class)
        print(f"wrote {args.eval_per_class * len(CLASSES)} frames to {args.eval_set} in {time.time() - t0:.0f}s")
        return
    if not args.out:
        ap.error("--out is required (unless --eval-set)")
    v = VARIANTS[args.variant]
    for key in ("per_class", "epochs", "holdout"):  # the variant's budget unless given
        if getattr(args, key) is None:
            setattr(args, key, getattr(v, key))
    os.makedirs(os.path.join(args.out, "samples"), exist_ok=True)

    # Separate streams so that changing one set's size does not change the others.
    seeds = np.random.SeedSequence(args.seed).spawn(4)
    train_rng, hold_rng, sample_rng, init_rng = (np.random.default_rng(s) for s in seeds)

    if args.eval_only:
        p = params_from_onnx(os.path.join(args.out, "classifier.onnx"), v)
    else:
        t0 = time.time()
        x, y = dataset(train_rng, args.per_class, v, v.wide)
        print(f"rendered {len(x)} training frames in {time.time() - t0:.0f}s", flush=True)
        p = init_params(init_rng, v)
        train(p, x, y, init_rng, args.epochs, batch=v.batch, lr=2e-3, transpose=v.transpose)

    hx, hy = dataset(hold_rng, args.holdout, v)
    acc, pred = accuracy(p, hx, hy)
    confusion = np.zeros((len(CLASSES), len(CLASSES)), int)
    for t, q in zip(hy, pred):
        confusion[t, q] += 1
    print(f"held-out accuracy on {len(hx)} fresh frames: {acc:.4f}")
    print("confusion (rows = truth):", CLASSES)
    print(confusion)
    if args.eval_only:
        if args.write_samples:
            skipped = write_samples(p, sample_rng, args.out, args.samples, v)
            print(f"wrote samples; skipped {skipped} misclassified frames")
            report_path = os.path.join(args.out, "training.json")
            if os.path.exists(report_path):
                report = json.load(open(report_path))
                report.update(samples_per_class=args.samples, samples_skipped_as_misclassified=skipped)
                with open(report_path, "w") as f:
                    json.dump(report, f, indent=2)
                    f.write("\n")
        return

    export_onnx(p, os.path.join(args.out, "classifier.onnx"), v)
    with open(os.path.join(args.out, "classes.txt"), "w") as f:
        f.write("\n".join(CLASSES) + "\n")

    skipped = write_samples(p, sample_rng, args.out, args.samples, v)
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
        **variant_report(v),
        **wide_report(v, args.per_class),
    }
    with open(os.path.join(args.out, "training.json"), "w") as f:
        json.dump(report, f, indent=2)
        f.write("\n")


if __name__ == "__main__":
    main()
