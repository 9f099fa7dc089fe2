#!/usr/bin/env python3
"""Time the reference runtime (onnxruntime from PyPI, CPU) called directly from Python, the
way benches/engines.rs times lineside's engines: one session per lane, `threads` intra-op
threads, batches of `batch` images of constant data, run back to back after a warm-up; the
rate is the median of three equal windows, each the images every lane finished in it over
the time those runs took, summed over lanes.

Prints one JSON object: {"images_per_s": ..., "windows": [...], "version": ...}.

Usage: .venv/bin/python tools/bench_onnxruntime.py MODEL.onnx --threads 2 --batch 8 --secs 3
       [--lanes 1]
"""

import argparse
import json
import threading
import time

import numpy as np
import onnxruntime as ort


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("model")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--batch", type=int, default=1)
    ap.add_argument("--lanes", type=int, default=1)
    ap.add_argument("--secs", type=float, default=3.0)
    ap.add_argument("--warmup", type=float, default=0.5)
    a = ap.parse_args()

    sessions = []
    for _ in range(a.lanes):
        so = ort.SessionOptions()
        so.intra_op_num_threads = a.threads
        so.inter_op_num_threads = 1
        sessions.append(ort.InferenceSession(a.model, so, providers=["CPUExecutionProvider"]))
    inp = sessions[0].get_inputs()[0]
    shape = [a.batch if not isinstance(d, int) else d for d in inp.shape]
    shape[0] = a.batch
    dtype = np.uint8 if inp.type == "tensor(uint8)" else np.float32
    x = (np.arange(int(np.prod(shape))) % 255).reshape(shape).astype(dtype)
    if dtype == np.float32:
        x /= 255.0

    start = time.perf_counter()
    window = start + a.warmup
    end = window + a.secs
    done = [[] for _ in range(a.lanes)]  # completion times of passes in the window

    def lane(i):
        s = sessions[i]
        while True:
            t0 = time.perf_counter()
            s.run(None, {inp.name: x})
            t = time.perf_counter()
            if t > end:
                return
            if t0 >= window:
                done[i].append((t, t - t0))

    threads = [threading.Thread(target=lane, args=(i,)) for i in range(a.lanes)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    third = a.secs / 3
    rates = []
    for w in range(3):
        lo, hi = window + w * third, window + (w + 1) * third
        rate = 0.0
        for d in done:
            runs = [dt for t, dt in d if lo <= t < hi]
            if runs:
                rate += len(runs) * a.batch / sum(runs)
        rates.append(rate)
    print(json.dumps({"images_per_s": sorted(rates)[1], "windows": rates, "version": ort.__version__}))


if __name__ == "__main__":
    main()
