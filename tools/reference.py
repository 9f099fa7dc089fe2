#!/usr/bin/env python3
"""Outside reference for lineside's tests: the washer samples through Pillow + onnxruntime.

For every sample frame in models/washers/samples this script
  1. resizes it to 96x96 with Pillow's BILINEAR filter (the preprocessing lineside's washer
     config describes) and saves that 8-bit image losslessly as
     tests/fixtures/washers/pillow96/<name>.png, so that the tests can rebuild the exact
     tensor (x = pixel / 255, NCHW);
  2. runs that tensor through onnxruntime (PyPI), applies softmax with numpy, and writes the
     probabilities to tests/fixtures/washers/reference.json.

The tests compare lineside against both: its own preprocessing against Pillow's pixels, its
engine against onnxruntime on the same tensor, and its full HTTP answer against onnxruntime.

Usage: .venv/bin/python tools/reference.py   (versions pinned in tools/requirements.txt)
"""

import json
import os
import sys

import numpy as np
import onnxruntime
import PIL
from PIL import Image

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BUNDLE = os.path.join(ROOT, "models", "washers")
OUT = os.path.join(ROOT, "tests", "fixtures", "washers")


def main() -> int:
    labels = open(os.path.join(BUNDLE, "classes.txt")).read().split()
    expected = json.load(open(os.path.join(BUNDLE, "samples", "expected.json")))
    opts = onnxruntime.SessionOptions()
    opts.intra_op_num_threads = 1
    sess = onnxruntime.InferenceSession(os.path.join(BUNDLE, "classifier.onnx"), opts, providers=["CPUExecutionProvider"])
    inp = sess.get_inputs()[0].name
    os.makedirs(os.path.join(OUT, "pillow96"), exist_ok=True)
    samples = {}
    for name in sorted(expected):
        frame = Image.open(os.path.join(BUNDLE, "samples", name)).convert("RGB")
        small = frame.resize((96, 96), Image.BILINEAR)
        small.save(os.path.join(OUT, "pillow96", name))
        x = (np.asarray(small, np.float32) / 255.0).transpose(2, 0, 1)[None]
        logits = sess.run(None, {inp: x})[0][0].astype(np.float64)
        e = np.exp(logits - logits.max())
        prob = e / e.sum()
        samples[name] = {
            "label": labels[int(prob.argmax())],
            "probabilities": [float(v) for v in prob],
        }
        if samples[name]["label"] != expected[name]["label"]:
            print(f"warning: {name}: onnxruntime says {samples[name]['label']}, expected.json says {expected[name]['label']}", file=sys.stderr)
    doc = {
        "source": f"onnxruntime {onnxruntime.__version__} (PyPI, CPUExecutionProvider, 1 thread) on tensors "
        f"from Pillow {PIL.__version__} Image.resize((96, 96), BILINEAR) / 255, softmax in numpy {np.__version__}",
        "labels": labels,
        "samples": samples,
    }
    with open(os.path.join(OUT, "reference.json"), "w") as f:
        json.dump(doc, f, indent=2)
        f.write("\n")
    print(f"wrote {len(samples)} samples to {os.path.relpath(OUT, ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
