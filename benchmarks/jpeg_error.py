"""Displacement error added by JPEG compression, measured on synthetic pairs.

For each seed, a random-dot reference/measurement pair is rendered through a
known smooth displacement field (bos.synthetic, 8-bit, with shot and read
noise), saved as lossless 8-bit PNG and as greyscale JPEG at several Pillow
quality settings, read back with bos.images.read_image, and processed with
bos.displacement.estimate (default multi-pass correlation).  The rms vector
error against the exact displacement is printed for each format; "added" is
the part attributed to JPEG, sqrt(rms_jpeg^2 - rms_png^2), and "ratio" is
rms_jpeg / rms_png measured in the same run, and the last column is the rms
difference between the vectors from the JPEG pair and from the PNG pair.

Run:  python benchmarks/jpeg_error.py [--size 384] [--seeds 3]
"""

from __future__ import annotations

import argparse
import tempfile
import warnings
from pathlib import Path

import numpy as np
from PIL import Image
from scipy.ndimage import map_coordinates

from bos import displacement, images, synthetic

QUALITIES = (70, 80, 90, 95, 100)


def field(rows, cols, *, shape):
    """Smooth test displacement [px]: gradient of a Gaussian bump, peak about 2 px."""
    cy, cx = (shape[0] - 1) / 2, (shape[1] - 1) / 2
    s = shape[0] / 6
    g = np.exp(-((rows - cy) ** 2 + (cols - cx) ** 2) / (2 * s * s))
    amp = 2.0 * np.exp(0.5)  # peak |d| = 2 px at r = s
    return -amp * (rows - cy) / s * g, -amp * (cols - cx) / s * g


def rms_error(est, truth_y, truth_x):
    pts = np.meshgrid(est.rows, est.cols, indexing="ij")
    ty = map_coordinates(truth_y, pts, order=1)
    tx = map_coordinates(truth_x, pts, order=1)
    err2 = (est.dy - ty) ** 2 + (est.dx - tx) ** 2
    ok = np.isfinite(err2)
    return float(np.sqrt(np.mean(err2[ok]))), float(np.mean(ok))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=384)
    ap.add_argument("--seeds", type=int, default=3)
    args = ap.parse_args()
    shape = (args.size, args.size)
    labels = ["png"] + [f"q{q}" for q in QUALITIES]
    errors: dict[str, list[float]] = {k: [] for k in labels}
    sizes: dict[str, list[int]] = {k: [] for k in labels}
    diffs: dict[str, list[float]] = {k: [] for k in labels}
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(args.seeds):
            pair = synthetic.render_pair(
                shape=shape, displacement=lambda r, c: field(r, c, shape=shape), bit_depth=8, seed=10 * seed
            )
            for label in labels:
                files = []
                for which, img in (("ref", pair.reference), ("meas", pair.measurement)):
                    im = Image.fromarray(np.clip(np.rint(img), 0, 255).astype(np.uint8))
                    path = Path(tmp) / f"{which}-{label}.{'png' if label == 'png' else 'jpg'}"
                    if label == "png":
                        im.save(path)
                    else:
                        im.save(path, quality=int(label[1:]))
                    files.append(path)
                    sizes[label].append(path.stat().st_size)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", images.LossyInputWarning)
                    ref, meas = (images.read_image(f) for f in files)
                est = displacement.estimate(ref.data, meas.data)
                rms, _ = rms_error(est, pair.displacement_y, pair.displacement_x)
                errors[label].append(rms)
                if label == "png":
                    lossless = est
                d2 = (est.dy - lossless.dy) ** 2 + (est.dx - lossless.dx) ** 2
                diffs[label].append(float(np.sqrt(np.nanmean(d2))))
    png = float(np.mean(errors["png"]))
    print(f"JPEG displacement error: {args.seeds} pair(s) of {shape[0]}x{shape[1]} px, 8-bit, peak |d| = 2 px, "
          "default correlation (windows 64/32/16, 50 % overlap)")
    print("| format | mean file size (kB) | rms error vs truth (px) | added by JPEG (px) | ratio to PNG "
          "| rms change vs PNG estimate (px) |")
    print("|---|---|---|---|---|---|")
    for label in labels:
        e = float(np.mean(errors[label]))
        added = np.sqrt(max(e * e - png * png, 0.0))
        name = "PNG (lossless)" if label == "png" else f"JPEG quality {label[1:]}"
        print(f"| {name} | {np.mean(sizes[label]) / 1024:.0f} | {e:.4f} | {added:.4f} | {e / png:.2f} | {np.mean(diffs[label]):.4f} |")


if __name__ == "__main__":
    main()
