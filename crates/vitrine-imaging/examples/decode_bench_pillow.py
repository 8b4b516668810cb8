"""Pillow side of decode_bench.rs: decode + torchvision-style preprocessing.

Usage: python decode_bench_pillow.py DIR ROUNDS
Prints "full <images/s>" and "draft <images/s>" (median of ROUNDS passes over
DIR/*.jpg, single-threaded). "draft" asks libjpeg for a DCT-scaled decode
whose shorter side is still at least twice the resize target, the same rule
the Rust decoder uses.
"""

import glob
import os
import statistics
import sys
import time

import numpy as np
from PIL import Image

RESIZE_SHORTER = 256
CROP = 224
MEAN = np.asarray((0.485, 0.456, 0.406), np.float32)
STD = np.asarray((0.229, 0.224, 0.225), np.float32)


def prepare(path, use_draft):
    img = Image.open(path)
    if use_draft:
        w, h = img.size
        short = min(w, h)
        # draft() picks the strongest scale that keeps the image >= this size.
        need = 2 * RESIZE_SHORTER
        img.draft("RGB", (w * need // short, h * need // short))
    img = img.convert("RGB")
    w, h = img.size
    if w <= h:
        size = (RESIZE_SHORTER, int(RESIZE_SHORTER * h / w))
    else:
        size = (int(RESIZE_SHORTER * w / h), RESIZE_SHORTER)
    img = img.resize(size, Image.BICUBIC)
    top = int(round((size[1] - CROP) / 2.0))
    left = int(round((size[0] - CROP) / 2.0))
    img = img.crop((left, top, left + CROP, top + CROP))
    arr = (np.asarray(img, np.float32) / np.float32(255.0) - MEAN) / STD
    return np.ascontiguousarray(arr.transpose(2, 0, 1))


def rate(paths, rounds, use_draft):
    rates = []
    for _ in range(rounds):
        start = time.perf_counter()
        for path in paths:
            prepare(path, use_draft)
        rates.append(len(paths) / (time.perf_counter() - start))
    return statistics.median(rates)


def main():
    directory, rounds = sys.argv[1], int(sys.argv[2])
    paths = sorted(glob.glob(os.path.join(directory, "*.jpg")))
    if not paths:
        sys.exit(f"no .jpg files in {directory}")
    print(f"full {rate(paths, rounds, False):.2f}")
    print(f"draft {rate(paths, rounds, True):.2f}")


if __name__ == "__main__":
    main()
