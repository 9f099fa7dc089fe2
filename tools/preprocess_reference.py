#!/usr/bin/env python3
"""Check `lineside preprocess` against Pillow + numpy, for every format and resize mode.

Renders test frames (a washer on a belt, with gradients, edges and noise; odd and even sizes),
encodes them in every format a line camera may send, builds the reference input tensor for
each case with Pillow and numpy, runs `lineside preprocess` on the same file and config, and
prints one JSON report: per case the largest and mean difference in 8-bit levels.

The reference pipeline (versions pinned in tools/requirements.txt):
  decode        Pillow's Image.open; ImageOps.exif_transpose when orientation = "exif".
                16-bit frames: the uint16 samples we encoded, as v / 257 in float
                (Pillow's own 16-to-8-bit conversion clips, so it is not the reference).
  roi           Image.crop((x, y, x + w, y + h)).
  channels      convert("RGB") or convert("L") (ITU-R BT.601 luma); bgr reverses the axis.
                16-bit: 0.299 R + 0.587 G + 0.114 B in float.
  resize        Image.resize(size, filter) (float frames: per channel in mode "F").
                crop: torchvision's Resize(S) + CenterCrop(W), by their formulas:
                  _compute_resized_output_size: short, long = min(w, h), max(w, h);
                    new_short, new_long = S, int(S * long / short)
                  center_crop: crop_top = int(round((image_height - crop_height) / 2.0)),
                    crop_left = int(round((image_width - crop_width) / 2.0))
                  with S = short_side (default W).
                letterbox: s = min(W / w, H / h), size int(w * s + 0.5) x int(h * s + 0.5),
                  pasted at ((W - nw) // 2, (H - nh) // 2) on a canvas of pad_value.
  normalise     (p / divisor - mean[c]) / std[c]; NCHW or NHWC; uint8 models get raw levels.

Usage: .venv/bin/python tools/preprocess_reference.py --lineside target/release/lineside --work DIR
       .venv/bin/python tools/preprocess_reference.py scores MODEL.onnx W H PRE_JSON FILE...
The second form prints, per file, onnxruntime's softmax probabilities on the reference tensor
(the end-to-end check against lineside's HTTP answers).
"""

import argparse
import io
import json
import os
import struct
import subprocess
import sys
import zlib

import numpy as np
import tifffile
from PIL import Image, ImageOps

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIX = os.path.join(ROOT, "tests", "fixtures")
FILTERS = {"nearest": Image.NEAREST, "bilinear": Image.BILINEAR, "bicubic": Image.BICUBIC,
           "lanczos": Image.LANCZOS, "area": Image.BOX}
IMAGENET = ([0.485, 0.456, 0.406], [0.229, 0.224, 0.225])  # common practice, RGB order

# ----------------------------------------------------------------------------- frames


def scene(w, h, seed, bits=8, noise=6.0):
    """A washer on a belt: a bright ring with a hole, a dark spur, a gradient, noise."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    cx, cy, r = w * 0.52, h * 0.47, min(w, h) * 0.33
    d = np.hypot(x - cx, y - cy)
    base = 40 + 50 * x / w + 30 * y / h
    ring = np.clip((r - d) * 2, 0, 1) * np.clip((d - r * 0.4) * 2, 0, 1)
    img = np.stack([base + 150 * ring, base * 0.9 + 140 * ring, base * 0.7 + 170 * ring], -1)
    img[(np.abs(y - cy) < 1.5) & (x > cx) & (x < cx + r)] *= 0.3  # a crack: a hard edge
    img[::7, :, 1] += 25  # fine stripes: aliasing shows filter differences
    img += rng.normal(0, noise, img.shape)
    top = 65535 if bits == 16 else 255
    img = np.clip(img / 255.0 * top, 0, top)
    return img.round().astype(np.uint16 if bits == 16 else np.uint8)


def png16(arr):
    """A 16-bit PNG by hand (Pillow cannot write 16-bit RGB): PNG spec, colour type 0/2/4."""
    h, w = arr.shape[:2]
    ch = 1 if arr.ndim == 2 else arr.shape[2]
    ctype = {1: 0, 2: 4, 3: 2}[ch]
    raw = b"".join(b"\x00" + arr[i].astype(">u2").tobytes() for i in range(h))

    def chunk(t, data):
        return struct.pack(">I", len(data)) + t + data + struct.pack(">I", zlib.crc32(t + data) & 0xFFFFFFFF)

    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 16, ctype, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def save(img, fmt, **kw):
    b = io.BytesIO()
    img.save(b, fmt, **kw)
    return b.getvalue()


def exif_with_orientation(o):
    ex = Image.Exif()
    ex[0x0112] = o
    return ex.tobytes()


def frames():
    """name -> (bytes, kind, sixteen_bit_array or None). kind: lossless | jpeg | lossy."""
    rgb = scene(173, 131, 1)
    im = Image.fromarray(rgb)
    gray = im.convert("L")
    out = {}
    out["png_rgb8"] = (save(im, "PNG"), "lossless", None)
    alpha = Image.fromarray((np.arange(173 * 131) % 251).astype(np.uint8).reshape(131, 173))
    out["png_rgba8"] = (save(Image.merge("RGBA", (*im.split(), alpha)), "PNG"), "lossless", None)
    out["png_gray8"] = (save(gray, "PNG"), "lossless", None)
    out["png_gray_alpha8"] = (save(Image.merge("LA", (gray, alpha)), "PNG"), "lossless", None)
    out["png_palette"] = (save(im.quantize(64), "PNG"), "lossless", None)
    rgb16 = scene(173, 131, 2, bits=16)
    out["png_rgb16"] = (png16(rgb16), "lossless", rgb16)
    g16 = rgb16[..., 0]
    out["png_gray16"] = (png16(g16), "lossless", g16)
    out["png_gray_alpha16"] = (png16(np.stack([g16, g16[::-1]], -1)), "lossless", g16)
    out["bmp_rgb8"] = (save(im, "BMP"), "lossless", None)
    out["tiff_rgb8"] = (save(im, "TIFF"), "lossless", None)
    out["tiff_gray8"] = (save(gray, "TIFF"), "lossless", None)
    b = io.BytesIO()
    tifffile.imwrite(b, rgb16, photometric="rgb")
    out["tiff_rgb16"] = (b.getvalue(), "lossless", rgb16)
    b = io.BytesIO()
    tifffile.imwrite(b, g16, photometric="minisblack")
    out["tiff_gray16"] = (b.getvalue(), "lossless", g16)
    out["webp_lossless"] = (save(im, "WEBP", lossless=True), "lossless", None)
    out["webp_lossy"] = (save(im, "WEBP", quality=90), "lossy", None)
    out["jpeg_baseline"] = (save(im, "JPEG", quality=92), "jpeg", None)
    out["jpeg_progressive"] = (save(im, "JPEG", quality=92, progressive=True), "jpeg", None)
    out["jpeg_gray"] = (save(gray, "JPEG", quality=92), "jpeg", None)
    out["jpeg_cmyk"] = (save(im.convert("CMYK"), "JPEG", quality=92), "jpeg", None)
    # Stored sideways with an EXIF orientation tag, as a rotated camera writes it.
    for o, tr in [(3, Image.Transpose.ROTATE_180), (6, Image.Transpose.ROTATE_90), (8, Image.Transpose.ROTATE_270)]:
        stored = im.transpose(tr)
        out[f"jpeg_exif{o}"] = (save(stored, "JPEG", quality=92, exif=exif_with_orientation(o)), "jpeg", None)
    out["png_exif6"] = (save(im.transpose(Image.Transpose.ROTATE_90), "PNG", exif=exif_with_orientation(6)),
                        "lossless", None)
    out["png_portrait"] = (save(Image.fromarray(scene(120, 161, 3)), "PNG"), "lossless", None)
    out["png_small"] = (save(Image.fromarray(scene(60, 45, 4)), "PNG"), "lossless", None)
    return out


# ----------------------------------------------------------------------------- reference


def resize_crop_box(w, h, W, s):
    short, long = (w, h) if w <= h else (h, w)
    new_short, new_long = s, int(s * long / short)
    nw, nh = (new_short, new_long) if w <= h else (new_long, new_short)
    top = int(round((nh - W) / 2.0))
    left = int(round((nw - W) / 2.0))
    return (nw, nh), (left, top, left + W, top + W)


def geometry(img_size, p, W, H, resize_fn, paste_fn):
    w, h = img_size
    mode = p.get("resize", "stretch")
    if mode == "stretch":
        return resize_fn((W, H), None)
    if mode == "crop":
        size, box = resize_crop_box(w, h, W, p.get("short_side", W))
        return resize_fn(size, box)
    s = min(W / w, H / h)
    nw, nh = int(w * s + 0.5), int(h * s + 0.5)
    return paste_fn(resize_fn((nw, nh), None), ((W - nw) // 2, (H - nh) // 2))


def reference_levels(data, arr16, p, W, H):
    """The model-sized image before normalisation, HWC float64 levels (C = 1 or 3)."""
    flt = FILTERS[p.get("filter", "bilinear")]
    gray = p.get("channels", "rgb") == "gray"
    pad = p.get("pad_value", 0)
    if arr16 is not None:
        a = arr16.astype(np.float64) / 257.0  # common practice: 16-bit -> 8-bit scale, unrounded
        if a.ndim == 2:
            a = a[..., None]
        if "roi" in p:
            x, y, w, h = p["roi"]
            a = a[y:y + h, x:x + w]
        if gray and a.shape[2] == 3:
            a = (0.299 * a[..., 0] + 0.587 * a[..., 1] + 0.114 * a[..., 2])[..., None]
        planes = [Image.fromarray(a[..., c].astype(np.float32)) for c in range(a.shape[2])]

        def rs(size, box):
            return [pl.resize(size, flt).crop(box) if box else pl.resize(size, flt) for pl in planes]

        def paste(parts, at):
            out = []
            for pl in parts:
                canvas = Image.new("F", (W, H), float(pad))
                canvas.paste(pl, at)
                out.append(canvas)
            return out

        parts = geometry((a.shape[1], a.shape[0]), p, W, H, rs, paste)
        levels = np.stack([np.asarray(pl, np.float64) for pl in parts], -1)
    else:
        img = Image.open(io.BytesIO(data))
        if p.get("orientation", "exif") == "exif":
            img = ImageOps.exif_transpose(img)
        if "roi" in p:
            x, y, w, h = p["roi"]
            img = img.crop((x, y, x + w, y + h))
        img = img.convert("L" if gray else "RGB")

        def rs(size, box):
            r = img.resize(size, flt)
            return r.crop(box) if box else r

        def paste(part, at):
            canvas = Image.new(img.mode, (W, H), pad if gray else (pad, pad, pad))
            canvas.paste(part, at)
            return canvas

        out = geometry(img.size, p, W, H, rs, paste)
        levels = np.asarray(out, np.float64)
        if levels.ndim == 2:
            levels = levels[..., None]
    if not gray and levels.shape[2] == 1:
        levels = np.repeat(levels, 3, axis=2)
    return levels


def reference_tensor(levels, p, layout, uint8):
    x = levels
    if p.get("channels") == "bgr":
        x = x[..., ::-1]
    if uint8:
        t = np.clip(np.round(x), 0, 255).astype(np.uint8)
    else:
        mean, std = np.array(p.get("mean", [0.0] * x.shape[2])), np.array(p.get("std", [1.0] * x.shape[2]))
        if p.get("normalize") == "imagenet":
            mean, std = np.array(IMAGENET[0]), np.array(IMAGENET[1])
            if p.get("channels") == "bgr":
                mean, std = mean[::-1], std[::-1]
        t = ((x / p.get("divisor", 255.0) - mean) / std).astype(np.float32)
    if layout == "nchw":
        t = t.transpose(2, 0, 1)
    return t[None]


def level_scale(p, channels):
    """Per model channel: tensor units -> 8-bit levels."""
    if p.get("normalize") == "imagenet":
        std = np.array(IMAGENET[1])
        if p.get("channels") == "bgr":
            std = std[::-1]
    else:
        std = np.array(p.get("std", [1.0] * channels))
    return std * p.get("divisor", 255.0)


# ----------------------------------------------------------------------------- cases

MODELS = {  # fixture -> (layout, uint8, fixed size or None, channels; see tools/fixtures.py)
    "dynamic_hw": ("nchw", False, None, 3),
    "lenet5": ("nchw", False, (32, 32), 1),
    "nhwc": ("nhwc", False, (64, 64), 3),
    "uint8": ("nchw", True, (32, 32), 3),
}


def cases(all_frames):
    out = []

    def add(name, frame, model="dynamic_hw", size=(40, 30), **p):
        out.append({"name": name, "frame": frame, "model": model, "size": size, "pre": p})

    for f in all_frames:  # every format through the default pipeline
        add(f"format/{f}", f)
    for mode, size in [("stretch", (40, 30)), ("crop", (64, 64)), ("letterbox", (48, 48))]:
        for flt in FILTERS:
            extra = {"crop": {"short_side": 73}, "letterbox": {"pad_value": 40}}.get(mode, {})
            add(f"{mode}/{flt}", "png_rgb8", size=size, resize=mode, filter=flt, **extra)
            add(f"{mode}/{flt}/16bit", "png_rgb16", size=size, resize=mode, filter=flt, **extra)
    add("crop/portrait_odd", "png_portrait", size=(57, 57), resize="crop", short_side=63, filter="bicubic")
    add("crop/upscale", "png_small", size=(96, 96), resize="crop", filter="bilinear")
    add("stretch/upscale_lanczos", "png_small", size=(96, 80), filter="lanczos")
    add("letterbox/portrait", "png_portrait", size=(64, 40), resize="letterbox", pad_value=0)
    add("channels/gray_from_rgb", "png_rgb8", model="lenet5", size=None, channels="gray")
    add("channels/gray_by_default", "png_rgb8", model="lenet5", size=None)  # no channels key: the model's 1
    add("channels/gray_from_rgb16", "png_rgb16", model="lenet5", size=None, channels="gray", filter="area")
    add("channels/bgr_imagenet", "png_rgb8", size=(48, 48), channels="bgr", normalize="imagenet", resize="crop",
        short_side=54)
    add("channels/rgb_mean_std", "tiff_rgb16", size=(48, 36), mean=[0.5, 0.4, 0.3], std=[0.2, 0.25, 0.3])
    add("layout/nhwc", "png_rgb8", model="nhwc", size=None, filter="bicubic")
    add("layout/uint8", "png_rgb8", model="uint8", size=None, filter="lanczos")
    add("roi/crop", "png_rgb8", size=(32, 32), roi=[20, 10, 120, 100], resize="crop")
    add("roi/after_exif", "png_exif6", size=(40, 30), roi=[5, 10, 100, 110])
    add("orientation/ignore", "png_exif6", size=(40, 30), orientation="ignore")
    return out


def toml_value(v):
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(float(v)) if isinstance(v, float) else str(v)


def write_config(path, case):
    model = os.path.join(FIX, case["model"])
    lines = ["[[models]]", 'name = "m"', f"onnx = {json.dumps(os.path.join(model, 'model.onnx'))}",
             f"labels = {json.dumps(os.path.join(model, 'classes.txt'))}", "[models.preprocess]"]
    if case["size"]:
        lines += [f"width = {case['size'][0]}", f"height = {case['size'][1]}"]
    lines += [f"{k} = {toml_value(v)}" for k, v in case["pre"].items()]
    with open(path, "w") as f:
        f.write("\n".join(lines) + "\n")


def scores(model, W, H, pre, files):
    """onnxruntime (1 thread, CPU) on the reference tensor of each file; softmax of the logits."""
    import onnxruntime

    opts = onnxruntime.SessionOptions()
    opts.intra_op_num_threads = 1
    sess = onnxruntime.InferenceSession(model, opts, providers=["CPUExecutionProvider"])
    inp = sess.get_inputs()[0]
    uint8 = inp.type == "tensor(uint8)"
    layout = "nhwc" if inp.shape[-1] in (1, 3) and inp.shape[1] not in (1, 3) else "nchw"
    out = {}
    for f in files:
        data = open(f, "rb").read()
        arr16 = None
        if f.endswith((".tif", ".tiff")):
            a = tifffile.imread(f)
            arr16 = a if a.dtype == np.uint16 else None  # 16-bit: v / 257, not Pillow's clipping
        levels = reference_levels(data, arr16, pre, W, H)
        x = reference_tensor(levels, pre, layout, uint8)
        z = sess.run(None, {inp.name: x})[0].reshape(-1).astype(np.float64)
        e = np.exp(z - z.max())
        out[os.path.basename(f)] = (e / e.sum()).tolist()
    json.dump(out, sys.stdout)


def main():
    if len(sys.argv) > 1 and sys.argv[1] == "scores":
        model, W, H, pre = sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), json.loads(sys.argv[5])
        return scores(model, W, H, pre, sys.argv[6:])
    ap = argparse.ArgumentParser()
    ap.add_argument("--lineside", required=True)
    ap.add_argument("--work", required=True)
    args = ap.parse_args()
    os.makedirs(args.work, exist_ok=True)
    all_frames = frames()
    for name, (data, _, _) in all_frames.items():
        with open(os.path.join(args.work, name), "wb") as f:
            f.write(data)
    report = []
    for case in cases(all_frames):
        data, kind, arr16 = all_frames[case["frame"]]
        layout, uint8, fixed, channels = MODELS[case["model"]]
        W, H = case["size"] or fixed
        # Without a channels key the config follows the model: one channel is gray.
        p = dict(case["pre"], channels=case["pre"].get("channels", "gray" if channels == 1 else "rgb"))
        slug = case["name"].replace("/", "-")
        cfg, out = os.path.join(args.work, slug + ".toml"), os.path.join(args.work, slug + ".npy")
        write_config(cfg, case)
        run = subprocess.run([args.lineside, "preprocess", "--config", cfg, os.path.join(args.work, case["frame"]),
                              "--out", out], capture_output=True, text=True)
        entry = {"name": case["name"], "kind": kind}
        if run.returncode != 0:
            entry["error"] = run.stderr.strip()
            report.append(entry)
            continue
        ref = reference_tensor(reference_levels(data, arr16, p, W, H), p, layout, uint8)
        ours = np.load(out)
        entry["shape"], entry["ref_shape"] = list(ours.shape), list(ref.shape)
        entry["dtype"], entry["ref_dtype"] = str(ours.dtype), str(ref.dtype)
        if ours.shape == ref.shape and ours.dtype == ref.dtype:
            diff = np.abs(ours.astype(np.float64) - ref.astype(np.float64))
            if not uint8:
                scale = level_scale(p, diff.shape[1] if layout == "nchw" else diff.shape[3])
                diff = diff * (scale[None, :, None, None] if layout == "nchw" else scale[None, None, None, :])
            entry["max"], entry["mean"] = float(diff.max()), float(diff.mean())
        report.append(entry)
    json.dump(report, sys.stdout, indent=1)


if __name__ == "__main__":
    main()
