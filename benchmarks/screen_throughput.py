"""Benchmark: screening 10,000 frames of 128x128 streamed against a saved basis.

Writes an invented set to a temporary folder (200 known-good reference frames and a
batch of N frames of 128x128 8-bit PNG: a smooth scene with jitter, lamp drift and noise,
1% of the batch with a dark spot), calibrates on the reference and saves the basis with
its limits (``screen --reference ... --save-basis``), then times:

- reading the batch alone, chunk by chunk as screening does (``read_images`` on 256 files
  at a time): the reference time, measured in the same run;
- ``imgreduce screen BATCH --basis SAVED -o OUT`` (one streamed pass: read, Q, T^2, local
  map, overlays for flagged frames, CSV, control chart);
- the same with a basis saved with ``--align`` (each frame aligned first).

Prints frames per second of both, their ratio (screen / read; 1.0 would mean screening
costs nothing beyond reading), and the peak memory the screening added (tracemalloc, numpy
buffers included; measured in a second run, since tracing slows it), against the size of
the whole batch as a float32 matrix: streaming keeps it to a few chunks' worth, the same
for any N.

Run: ``python benchmarks/screen_throughput.py [N]`` (N = 10000 by default; writing the
PNGs takes about half a minute on 2 cores, screening about as long again).
"""

import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
from PIL import Image
from scipy import ndimage

from imgreduce.cli import main as cli
from imgreduce.ingest import find_images, read_images


def write_set(folder, n_ref, n_batch, size=128, seed=0):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size] / size
    scene = (0.45 + 0.2 * np.sin(6 * xx) * np.cos(4 * yy)
             + 0.15 * ndimage.gaussian_filter(rng.standard_normal((size, size)), 3) * 8)
    for sub, n in (("reference", n_ref), ("batch", n_batch)):
        (folder / sub).mkdir(parents=True)
        for i in range(n):
            img = ndimage.shift(scene, rng.normal(0, 0.2, 2), order=1, mode="nearest")
            img = img * (1 + rng.normal(0, 0.02)) + rng.normal(0, 0.01, img.shape)
            if sub == "batch" and i % 100 == 50:
                r, c = rng.integers(10, size - 10, 2)
                img[r - 2:r + 3, c - 2:c + 3] *= 0.4
            arr = np.clip(np.rint(img * 255), 0, 255).astype(np.uint8)
            Image.fromarray(arr).save(folder / sub / f"frame_{i:05d}.png")


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        write_set(tmp, 200, n)
        print(f"wrote {n} batch + 200 reference PNGs of 128x128 in "
              f"{time.perf_counter() - t0:.1f} s")
        saved = tmp / "screen.npz"
        assert cli(["screen", str(tmp / "batch" / "frame_00000.png"),
                    str(tmp / "batch" / "frame_00001.png"), "--reference",
                    str(tmp / "reference"), "--save-basis", str(saved), "-q"]) == 0

        files = find_images(tmp / "batch")
        t0 = time.perf_counter()
        for start in range(0, len(files), 256):
            read_images(files[start:start + 256], min_images=1)
        read_s = time.perf_counter() - t0

        argv = ["screen", str(tmp / "batch"), "--basis", str(saved), "-q", "-o"]
        t0 = time.perf_counter()
        assert cli(argv + [str(tmp / "out")]) == 0
        screen_s = time.perf_counter() - t0
        # Memory in a second run: tracemalloc slows numpy-heavy code several times.
        tracemalloc.start()
        assert cli(argv + [str(tmp / "out2")]) == 0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        # The same with --align (a separate saved basis; alignment adds its own cost).
        aligned = tmp / "aligned.npz"
        assert cli(["screen", str(tmp / "batch" / "frame_00000.png"), "--reference",
                    str(tmp / "reference"), "--align", "--save-basis", str(aligned),
                    "-q"]) == 0
        t0 = time.perf_counter()
        assert cli(["screen", str(tmp / "batch"), "--basis", str(aligned), "-q", "-o",
                    str(tmp / "out3")]) == 0
        align_s = time.perf_counter() - t0
        rows_a = [r.split(",") for r in
                  (tmp / "out3" / "screen.csv").read_text().splitlines()[1:]]
        rows = [r.split(",") for r in (tmp / "out" / "screen.csv").read_text().splitlines()[1:]]
        spot = [int(Path(r[0]).stem[-5:]) % 100 == 50 for r in rows]
        flagged = sum(r[7] == "1" for r in rows)
        caught = sum(r[7] == "1" for r, s in zip(rows, spot) if s)
        false_alarms = sum(r[7] == "1" for r, s in zip(rows, spot) if not s)
        matrix = n * 128 * 128 * 4
        print(f"{n} frames of 128x128, basis rank from the reference, chunks of 256")
        print(f"  read only    {read_s:7.2f} s  {n / read_s:8.0f} frames/s")
        print(f"  screen       {screen_s:7.2f} s  {n / screen_s:8.0f} frames/s  "
              f"({flagged} flagged: {caught} of {sum(spot)} frames with a spot, "
              f"{false_alarms} of {n - sum(spot)} good ones)")
        print(f"  ratio        {screen_s / read_s:7.2f}   screen / read")
        caught_a = sum(r[7] == "1" for r, s in zip(rows_a, spot) if s)
        false_a = sum(r[7] == "1" for r, s in zip(rows_a, spot) if not s)
        print(f"  --align      {align_s:7.2f} s  {n / align_s:8.0f} frames/s  "
              f"({caught_a} of {sum(spot)} spots, {false_a} good frames flagged)  "
              f"ratio {align_s / read_s:.2f}")
        print(f"  peak memory  {peak / 2**20:7.1f} MiB added while screening, "
              f"{peak / matrix:.3f}x the batch as a float32 matrix "
              f"({matrix / 2**20:.0f} MiB)")


if __name__ == "__main__":
    main()
