"""Benchmark: time of ``choose`` (5-fold held-out curves, K = 100) against one fit.

On a float32 low-rank-plus-noise matrix of 2000 images of 128x128 (the matrix of
``fit_vs_reference.py``), prints the time of one ``fit_basis`` at rank 100, of
``choose_rank`` with 5 folds (5 fits on 4/5 of the images, scoring every image at every
rank 1..100, SSIM on 100 images at the visited ranks, the spectrum for the rank rules) and
their ratio. It also compares the held-out curves with fold fits of 2 and of 4 power
iterations, to show the cheaper setting does not move them.

Run: ``python benchmarks/choose_vs_fit.py`` (about a minute on 2 cores).
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from fit_vs_reference import make_matrix  # noqa: E402

from imgreduce import fit_basis  # noqa: E402
from imgreduce.quality import choose_rank, cross_validated_curve  # noqa: E402


def main():
    x = make_matrix(2000, 128)
    t0 = time.perf_counter()
    fit_basis(x, rank=100, seed=0)
    fit_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    choice = choose_rank(x, image_shape=(128, 128), target_psnr=35.0, max_rank=100)
    choose_s = time.perf_counter() - t0
    print(f"2000 images x 128x128, K = 100")
    print(f"  one fit      {fit_s:7.2f} s")
    print(f"  choose       {choose_s:7.2f} s   (rank {choice.rank}, rule {choice.rule}, "
          f"target met: {choice.target_met})")
    print(f"  ratio        {choose_s / fit_s:7.2f}   choose / fit (5 folds: expect ~5)")
    a = cross_validated_curve(x, max_rank=100, power_iterations=2).summary()
    b = cross_validated_curve(x, max_rank=100, power_iterations=4).summary()
    for key in ("psnr_mean", "psnr_p05"):
        diff = np.max(np.abs(a[key][1:] - b[key][1:]))
        print(f"  {key:9s} largest change, 2 vs 4 fold power iterations: {diff:.4f} dB")


if __name__ == "__main__":
    main()
