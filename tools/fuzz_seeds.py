"""Write the fuzz targets' seed corpora (fuzz/seeds/<target>/): a few small valid inputs of
each kind, made with Pillow (the reference library the preprocessing tests use), so that
libFuzzer starts from inputs that reach past the first checks.

Run: .venv/bin/python tools/fuzz_seeds.py   (the files are committed; rerun only to change them)
"""

import io
import os
import struct

from PIL import Image

ROOT = os.path.join(os.path.dirname(__file__), "..", "fuzz", "seeds")
# The frame target reads its settings from the first 32 bytes.
SETTINGS = [bytes(32), bytes(range(32)), bytes([0xFF] * 32), bytes([7, 200, 13, 90] * 8)]


def write(target, name, data):
    folder = os.path.join(ROOT, target)
    os.makedirs(folder, exist_ok=True)
    with open(os.path.join(folder, name), "wb") as f:
        f.write(data)


def encoded(img, fmt, **kw):
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def frames():
    # A washer-like ring on a plain background, 24 x 18: small, but every resize path runs.
    rgb = Image.new("RGB", (24, 18), (40, 40, 48))
    for y in range(18):
        for x in range(24):
            r2 = (x - 12) ** 2 + (y - 9) ** 2
            if 16 <= r2 <= 64:
                rgb.putpixel((x, y), (180, 182, 190))
    exif = Image.Exif()
    exif[0x0112] = 6  # EXIF Orientation: rotate 90 degrees clockwise to display
    out = {
        "baseline.jpg": encoded(rgb, "JPEG", quality=80),
        "progressive.jpg": encoded(rgb, "JPEG", quality=80, progressive=True),
        "gray.jpg": encoded(rgb.convert("L"), "JPEG"),
        "exif6.jpg": encoded(rgb, "JPEG", exif=exif.tobytes()),
        "rgb.png": encoded(rgb, "PNG"),
        "rgba.png": encoded(rgb.convert("RGBA"), "PNG"),
        "gray16.png": encoded(rgb.convert("L").convert("I;16"), "PNG"),
        "palette.png": encoded(rgb.convert("P"), "PNG"),
        "rgb.bmp": encoded(rgb, "BMP"),
        "rgb.tif": encoded(rgb, "TIFF"),
        "lossless.webp": encoded(rgb, "WEBP", lossless=True),
        "lossy.webp": encoded(rgb, "WEBP", quality=50),
    }
    for i, (name, data) in enumerate(sorted(out.items())):
        write("frame", name, SETTINGS[i % len(SETTINGS)] + data)


def multipart():
    def body(boundary, parts):
        out = b"preamble\r\n"
        for name, data in parts:
            out += b"--" + boundary + b"\r\n"
            out += b'Content-Disposition: form-data; name="image"; filename="' + name + b'"\r\n'
            out += b"Content-Type: image/jpeg\r\n\r\n" + data + b"\r\n"
        return out + b"--" + boundary + b"--\r\n"

    write("multipart", "two", b"multipart/form-data; boundary=XyZ\n" + body(b"XyZ", [(b"a.jpg", b"\xff\xd8ab"), (b"b.jpg", b"cd")]))
    write("multipart", "quoted", b'multipart/form-data; boundary="q q"\n' + body(b"q q", [(b"w-0042.png", b"\x89PNG")]))
    write("multipart", "noheaders", b"multipart/form-data; boundary=b\n--b\r\n\r\nxx\r\n--b--")


def request():
    # Read by arbitrary's take_rest: free-form bytes; these only seed the dictionary of shapes.
    for i, text in enumerate([b"top=all", b"top=2&top=3", b"\x05\x00\x00\x10150\x00W-0042\x00cam-3", b"k=1;"]):
        write("request", f"seed{i}", text)


def npy():
    write("npy", "nchw", bytes([4, 0, 1, 3, 3, 2, 1, 0]) + bytes(range(64)))
    write("npy", "empty", bytes([0]))
    write("npy", "f32", struct.pack("<4B", 2, 0, 2, 3) + struct.pack("<6f", 0.5, -1.0, 3.25, 0.0, 1e-7, 2.0))


def config():
    here = os.path.join(os.path.dirname(__file__), "..", "config", "lineside.toml")
    with open(here, "rb") as f:
        write("config", "lineside.toml", f.read())
    write("config", "minimal.toml", b'[[models]]\nname = "washers"\nonnx = "w.onnx"\nlabels = "w.txt"\n')
    write(
        "config",
        "decision.toml",
        b'[server]\nlisten = "127.0.0.1:8080"\ndeadline_ms = 200\n\n[[models]]\nname = "w"\nonnx = "w.onnx"\n'
        b'labels = "l.txt"\nmin_score = 0.8\n[models.preprocess]\nwidth = 64\nheight = 64\nresize = "letterbox"\n'
        b'[models.decision]\naccept = ["good"]\nreject = ["scratched"]\n',
    )


if __name__ == "__main__":
    frames()
    multipart()
    request()
    npy()
    config()
