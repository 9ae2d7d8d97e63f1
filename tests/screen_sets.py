"""Screening test sets: the demo line at a larger size, and one built from a real photograph.

Both return ``reference, batch, kinds, boxes`` with 8-bit-quantized float32 rows; ``kinds``
says ``'good'`` or the defect, ``boxes`` the drawn defect's ``[row0, col0, row1, col1]``
(end exclusive) or None.
"""

import numpy as np
from scipy import ndimage

SHAPE = (96, 128)


def _q8(rows):
    return (np.rint(np.asarray(rows, dtype=np.float64) * 255) / 255).astype(np.float32)


def line_set(n_ref=200, n_good=300, per_kind=4, seed=5):
    """The invented demo line (imgreduce.demo's generator) with more frames than shipped."""
    from imgreduce import demo

    rng = np.random.default_rng(seed)
    line = demo._Line(np.random.default_rng(demo.SEED))
    ref = [demo._noise(demo._good_frame(line, rng)[0][0], rng).ravel() for _ in range(n_ref)]
    kinds = ["good"] * n_good + [k for k in ("scratch", "dent", "missing_hole", "particle",
                                             "blur", "shifted", "wrong_part")
                                 for _ in range(per_kind)]
    rng.shuffle(kinds)
    batch, boxes = [], []
    for kind in kinds:
        if kind == "good":
            img, box = demo._good_frame(line, rng)[0][0], None
        else:
            img, box = demo._defect(kind, line, rng)
        batch.append(demo._noise(img, rng).ravel())
        boxes.append(box)
    return _q8(ref), _q8(batch), np.array(kinds), boxes


def photo_set(n_ref=150, n_good=200, per_kind=5, seed=0):
    """Frames of a real photograph: scikit-image's camera(), a 96x128 crop.

    Good frames: sub-pixel jitter (sd 0.25 px), lamp drift (gain sd 2%, offset sd 0.01)
    and sensor noise (sd 0.01). Defects drawn in: a dark spot (radius 2.5 px), a bright
    scratch (14 px), a faint smudge (Gaussian, sd 4 px, +0.08).
    """
    from skimage import data

    rng = np.random.default_rng(seed)
    base = data.camera()[100:196, 180:308].astype(np.float32) / 255

    def good():
        img = ndimage.shift(base, rng.normal(0, 0.25, 2), order=1, mode="nearest")
        return img * (1 + rng.normal(0, 0.02)) + rng.normal(0, 0.01)

    def noisy(img):
        return np.clip(img + rng.normal(0, 0.01, img.shape), 0, 1)

    ref = [noisy(good()).ravel() for _ in range(n_ref)]
    kinds = ["good"] * n_good + [k for k in ("spot", "scratch", "smudge")
                                 for _ in range(per_kind)]
    rng.shuffle(kinds)
    yy, xx = np.mgrid[0:SHAPE[0], 0:SHAPE[1]]
    batch, boxes = [], []
    for kind in kinds:
        img, box = good(), None
        if kind != "good":
            r0, c0 = int(rng.integers(15, 81)), int(rng.integers(15, 113))
            if kind == "spot":
                img = img * (1 - 0.6 * (np.hypot(yy - r0, xx - c0) < 2.5))
                box = [r0 - 3, c0 - 3, r0 + 4, c0 + 4]
            elif kind == "scratch":
                cols = np.arange(c0 - 7, c0 + 7)
                rows = (r0 + 0.3 * (cols - c0)).astype(int)
                img = img.copy()
                img[rows, cols] += 0.12
                box = [rows.min() - 1, cols.min() - 1, rows.max() + 2, cols.max() + 2]
            else:
                img = img + 0.08 * np.exp(-((yy - r0) ** 2 + (xx - c0) ** 2) / 32.0)
                box = [r0 - 8, c0 - 8, r0 + 9, c0 + 9]
        batch.append(noisy(img).ravel())
        boxes.append(box)
    return _q8(ref), _q8(batch), np.array(kinds), boxes


def score(result, kinds, boxes, margin=2):
    """Recall of defective frames, false-alarm rate on good ones, peak-inside-box rate."""
    flagged = result.flagged
    bad = kinds != "good"
    inside = []
    for i in np.flatnonzero(bad & flagged):
        if boxes[i] is not None:
            r0, c0, r1, c1 = boxes[i]
            pr, pc = result.peak[i]
            inside.append(r0 - margin <= pr < r1 + margin and c0 - margin <= pc < c1 + margin)
    return (float((flagged & bad).sum() / bad.sum()),
            float((flagged & ~bad).sum() / (~bad).sum()),
            float(np.mean(inside)) if inside else float("nan"))


class Batch:
    """The least an ImageStack offers screen_batch: pixels, image_shape, paths."""

    def __init__(self, pixels, shape=SHAPE):
        self.pixels, self.image_shape = pixels, shape
        self.paths = [f"frame_{i:04d}" for i in range(len(pixels))]
