#!/usr/bin/env python3
"""Pillow's side of `cargo bench --bench preprocess`: the same frames through the same work.

JPEG: Image.open + convert("RGB") + resize to short side 256 (BILINEAR) + centre crop 224 +
ImageNet normalisation to NCHW float32 with numpy. PNG: open + convert + resize to 96x96 +
/ 255 to NCHW. Prints medians in ms as JSON. Usage: bench_pillow.py FRAME.jpg FRAME.png
"""

import io
import json
import sys
import time

import numpy as np
import PIL
from PIL import Image

MEAN = np.array([0.485, 0.456, 0.406], np.float32)  # ImageNet statistics (common practice)
STD = np.array([0.229, 0.224, 0.225], np.float32)


def median(n, f):
    for _ in range(3):
        f()
    t = []
    for _ in range(n):
        s = time.perf_counter()
        f()
        t.append(time.perf_counter() - s)
    return sorted(t)[n // 2] * 1e3


def jpeg_full(data):
    im = Image.open(io.BytesIO(data)).convert("RGB")
    w, h = im.size
    s = 256
    nw, nh = (s, int(s * h / w)) if w <= h else (int(s * w / h), s)
    im = im.resize((nw, nh), Image.BILINEAR)
    left, top = int(round((nw - 224) / 2.0)), int(round((nh - 224) / 2.0))
    im = im.crop((left, top, left + 224, top + 224))
    x = (np.asarray(im, np.float32) / 255.0 - MEAN) / STD
    return np.ascontiguousarray(x.transpose(2, 0, 1))


def png_full(data):
    im = Image.open(io.BytesIO(data)).convert("RGB").resize((96, 96), Image.BILINEAR)
    return np.ascontiguousarray((np.asarray(im, np.float32) / 255.0).transpose(2, 0, 1))


def main():
    jpeg, png = open(sys.argv[1], "rb").read(), open(sys.argv[2], "rb").read()
    out = {
        "version": PIL.__version__,
        "jpeg_full_ms": median(41, lambda: jpeg_full(jpeg)),
        "jpeg_decode_ms": median(41, lambda: Image.open(io.BytesIO(jpeg)).convert("RGB")),
        "png_full_ms": median(161, lambda: png_full(png)),
    }
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
