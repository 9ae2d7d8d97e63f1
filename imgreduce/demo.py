"""The demo scenario: an invented inspection line, generated deterministically.

A fixed overhead camera looks down on a conveyor belt carrying stamped steel mounting
plates: a rounded rectangle with four corner holes, a central slot and a bend line across
the plate. Every frame differs a little, as on a real line: sub-pixel placement and a
slight rotation of the part, a drifting lamp (gain and offset), the belt's texture moving
underneath, vignetting and sensor noise. A batch from a later shift holds a handful of
defective parts: scratches, dents, a missing hole, a foreign particle, a blurred frame,
a part shifted on the belt and a wrong part.

Nothing here is real data. ``demo_images/`` in the repository is exactly what
:func:`generate_demo_images` writes (a test checks it); run
``python -m imgreduce.demo --regenerate`` after changing the generator.
"""

import json
import sys
from pathlib import Path

import numpy as np

from ._files import write_image, write_text

__all__ = ["generate_demo_images", "demo_images_path", "run_demo", "GENERATOR_VERSION"]

GENERATOR_VERSION = 1
SEED = 20261202
WIDTH, HEIGHT = 128, 96
# Defective frames of the batch (index -> kind); the rest of the batch is good.
BATCH_DEFECTS = {4: "scratch", 11: "dent", 17: "missing_hole", 23: "particle",
                 29: "blur", 34: "shifted", 40: "scratch", 46: "wrong_part", 52: "dent"}
_HOLES = [(-40.0, -26.0), (40.0, -26.0), (-40.0, 26.0), (40.0, 26.0)]
_WRONG_HOLES = [(-40.0, -26.0), (40.0, -26.0), (0.0, 26.0), (-20.0, 0.0)]


def _soft(distance, edge=0.7):
    """Anti-aliased inside-ness from a signed distance (negative inside)."""
    return np.clip(0.5 - distance / edge, 0.0, 1.0)


class _Line:
    """Everything that stays fixed on the line: belt texture, vignetting."""

    def __init__(self, rng):
        self.belt = rng.normal(0.0, 1.0, (HEIGHT, 4 * WIDTH)).astype(np.float32)
        from scipy.ndimage import gaussian_filter

        self.belt = gaussian_filter(self.belt, (1.2, 2.5), mode="wrap")
        self.belt /= self.belt.std()
        yy, xx = np.mgrid[0:HEIGHT, 0:WIDTH].astype(np.float32)
        r2 = ((xx - WIDTH / 2) / WIDTH) ** 2 + ((yy - HEIGHT / 2) / HEIGHT) ** 2
        self.vignette = 1.0 - 0.35 * r2
        self.yy, self.xx = yy, xx


def _render(line, rng, *, holes=_HOLES, dx=0.0, dy=0.0, angle=0.0, gain=1.0, offset=0.0,
            belt_phase=0, fill_hole=None):
    """One frame as float32 in [0, 1], before noise and defects; also the plate mask."""
    cx, cy = WIDTH / 2 + dx, HEIGHT / 2 + dy
    c, s = np.cos(angle), np.sin(angle)
    u = c * (line.xx - cx) + s * (line.yy - cy)      # part coordinates
    v = -s * (line.xx - cx) + c * (line.yy - cy)
    half_w, half_h, radius = 50.0, 36.0, 8.0
    qx, qy = np.abs(u) - (half_w - radius), np.abs(v) - (half_h - radius)
    outside = np.hypot(np.maximum(qx, 0), np.maximum(qy, 0)) + np.minimum(np.maximum(qx, qy), 0)
    plate = _soft(outside - radius)
    for i, (hx, hy) in enumerate(holes):
        if i != fill_hole:
            plate *= 1 - _soft(np.hypot(u - hx, v - hy) - 5.0)
    slot = np.maximum(np.abs(u) - 12.0, 0) ** 2 + np.maximum(np.abs(v) - 3.0, 0) ** 2
    plate *= 1 - _soft(np.sqrt(slot) - 0.01)
    # The bend: the far side of the plate tilts away from the lamp and looks darker.
    shade = 0.72 - 0.10 * _soft(-(u - 18.0), edge=3.0) + 0.03 * np.tanh(v / 30.0)
    belt = 0.16 + 0.025 * np.roll(line.belt, -belt_phase, axis=1)[:, :WIDTH]
    img = belt * (1 - plate) + shade * plate
    img = (gain * img + offset) * line.vignette
    return img.astype(np.float32), plate


def _good_frame(line, rng, **extra):
    params = dict(dx=rng.normal(0, 0.4), dy=rng.normal(0, 0.4),
                  angle=np.deg2rad(rng.normal(0, 0.2)), gain=1 + rng.normal(0, 0.025),
                  offset=rng.normal(0, 0.008), belt_phase=int(rng.integers(0, 3 * WIDTH)))
    params.update(extra)
    return _render(line, rng, **params), params


def _noise(img, rng):
    # Shot noise of a well-exposed industrial sensor (~0.013 at the plate's grey level).
    shot = np.sqrt(np.clip(img, 0, None) / 4000.0) * rng.standard_normal(img.shape)
    out = img + 0.006 * rng.standard_normal(img.shape) + shot
    return np.clip(out, 0, 1).astype(np.float32)


def _defect(kind, line, rng):
    """A defective frame and the box [row0, col0, row1, col1] (end exclusive) or None."""
    if kind == "shifted":
        (img, _), _ = _good_frame(line, rng, dx=rng.choice([-1, 1]) * 5.0, dy=2.5)
        return img, None
    if kind == "wrong_part":
        (img, _), _ = _good_frame(line, rng, holes=_WRONG_HOLES)
        return img, None
    if kind == "missing_hole":
        hole = int(rng.integers(0, 4))
        (img, _), p = _good_frame(line, rng, fill_hole=hole)
        hx, hy = _HOLES[hole]
        r, c = int(round(HEIGHT / 2 + p["dy"] + hy)), int(round(WIDTH / 2 + p["dx"] + hx))
        return img, [r - 7, c - 7, r + 8, c + 8]
    (img, plate), _ = _good_frame(line, rng)
    if kind == "blur":
        from scipy.ndimage import gaussian_filter

        return gaussian_filter(img, 1.6), None
    inside = np.argwhere(plate > 0.99)
    if kind == "scratch":
        r0, c0 = inside[rng.integers(len(inside))]
        length, theta = rng.uniform(18, 28), rng.uniform(0, np.pi)
        t = np.linspace(0, length, 200)
        rows = np.clip(r0 + t * np.sin(theta), 0, HEIGHT - 1)
        cols = np.clip(c0 + t * np.cos(theta), 0, WIDTH - 1)
        mark = np.zeros_like(img)
        mark[np.round(rows).astype(int), np.round(cols).astype(int)] = 1.0
        from scipy.ndimage import gaussian_filter

        mark = gaussian_filter(mark, 0.6)
        mark /= mark.max()
        img = img + 0.09 * mark * plate
        box = [int(rows.min()) - 1, int(cols.min()) - 1, int(rows.max()) + 2,
               int(cols.max()) + 2]
    elif kind == "dent":
        r0, c0 = inside[rng.integers(len(inside))]
        dr, dc = line.yy - r0, line.xx - c0
        bump = np.exp(-(dr ** 2 + dc ** 2) / (2 * 3.0 ** 2))
        # Light from the side: a dent is a bright flank next to a dark one.
        img = img + 0.10 * (dc / 3.0) * bump * plate
        box = [int(r0) - 7, int(c0) - 7, int(r0) + 8, int(c0) + 8]
    elif kind == "particle":
        r0, c0 = inside[rng.integers(len(inside))]
        dot = _soft(np.hypot(line.yy - r0, line.xx - c0) - 1.6)
        img = img * (1 - 0.7 * dot)
        box = [int(r0) - 4, int(c0) - 4, int(r0) + 5, int(c0) + 5]
    else:
        raise ValueError(f"unknown defect kind {kind!r}")
    box = [max(box[0], 0), max(box[1], 0), min(box[2], HEIGHT), min(box[3], WIDTH)]
    return img.astype(np.float32), box


def generate_demo_images(folder, *, seed=SEED, n_reference=120, n_batch=60):
    """Write the demo scenario into `folder` (created if missing).

    Layout: ``reference/part_0001.png ...`` (known-good frames), ``batch/part_0001.png
    ...`` (a later batch with defective frames), ``labels.json`` (each batch frame's kind
    and, for local defects, its box ``[row0, col0, row1, col1]``, end exclusive).

    Parameters
    ----------
    folder : str or Path
    seed : int
    n_reference, n_batch : int

    Returns
    -------
    Path
        The folder.

    Examples
    --------
    >>> import tempfile
    >>> out = generate_demo_images(tempfile.mkdtemp(), n_reference=3, n_batch=5)
    >>> sorted(p.name for p in (out / "batch").iterdir())
    ['part_0001.png', 'part_0002.png', 'part_0003.png', 'part_0004.png', 'part_0005.png']
    """
    folder = Path(folder)
    rng = np.random.default_rng(seed)
    line = _Line(rng)
    for sub in ("reference", "batch"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    for i in range(n_reference):
        (img, _), _ = _good_frame(line, rng)
        write_image(folder / "reference" / f"part_{i + 1:04d}.png", _noise(img, rng))
    frames = []
    for i in range(n_batch):
        kind = BATCH_DEFECTS.get(i, "good")
        if kind == "good":
            (img, _), _ = _good_frame(line, rng)
            box = None
        else:
            img, box = _defect(kind, line, rng)
        name = f"part_{i + 1:04d}.png"
        write_image(folder / "batch" / name, _noise(img, rng))
        frames.append({"file": f"batch/{name}", "kind": kind, "box": box})
    labels = {
        "scenario": "Invented: overhead camera over stamped steel mounting plates on a "
                    "conveyor; reference = known-good frames, batch = a later shift with "
                    "defective parts. Generated, not real data.",
        "generator_version": GENERATOR_VERSION, "seed": seed,
        "size": [WIDTH, HEIGHT], "bit_depth": 8,
        "box_convention": "[row0, col0, row1, col1], end exclusive",
        "batch": frames,
    }
    write_text(folder / "labels.json", json.dumps(labels, indent=1) + "\n")
    return folder


def demo_images_path():
    """The shipped demo images: the repository's ``demo_images/``, else a generated copy.

    In a source checkout (and an editable install) the committed folder is used. An
    installed wheel does not carry it, so the same images are generated once into
    ``~/.cache/imgreduce/demo_images-v{GENERATOR_VERSION}``.
    """
    shipped = Path(__file__).resolve().parent.parent / "demo_images"
    if (shipped / "labels.json").exists():
        return shipped
    cache = Path.home() / ".cache" / "imgreduce" / f"demo_images-v{GENERATOR_VERSION}"
    if not (cache / "labels.json").exists():
        generate_demo_images(cache)
    return cache


def run_demo(output, *, progress=False, say=print):
    """The main job on the demo images: choose a rank, fit, draw, rebuild, screen.

    Chooses a rank by 5-fold held-out curves on the reference frames (5th-percentile
    PSNR target 32 dB, the level where this scene's sensor noise starts to dominate),
    fits a basis of that rank, draws it, and rebuilds three defective batch frames with
    error maps, where the defects show as structure the basis cannot represent. Then
    screens the batch at alpha 0.01, frames aligned to the reference by sub-pixel
    translation (parts land a little differently on the belt), against limits
    calibrated by 5-fold over the reference frames, writes ``screen/`` (control chart,
    overlays of flagged frames, screen.csv) and scores the flags against the batch's
    labels.

    Parameters
    ----------
    output : str or Path
        Folder for the results (created if missing).
    progress : bool
        Progress bars on stderr.
    say : callable
        Receives one line of text per step.

    Returns
    -------
    dict
        ``images``, ``rank``, ``rules`` (the other rank rules' answers), ``basis`` and
        ``written`` (paths of the files made).
    """
    from .basis import fit_basis
    from .ingest import read_images
    from .plots import (plot_components, plot_mean_image, plot_quality_curves,
                        plot_rebuild_panel, plot_spectrum, save_figure)
    from .quality import choose_rank

    output = Path(output)
    output.mkdir(parents=True, exist_ok=True)
    source = demo_images_path()
    say(f"demo images: {source} (invented scene: stamped plates on a conveyor)")
    stack = read_images(source / "reference", progress=progress)
    choice = choose_rank(stack.pixels, image_shape=stack.image_shape, target_psnr=32.0,
                         max_rank=60, progress=progress)
    rules = {k: v["rank"] for k, v in choice.rules.items()}
    say(f"rank {choice.rank}: smallest whose 5th-percentile held-out frame reaches 32 dB "
        f"(Gavish-Donoho {rules['gavish_donoho']}, broken stick {rules['broken_stick']})")
    basis = fit_basis(stack, rank=choice.rank, progress=progress)
    basis_path = output / "basis.npz"
    basis.save(basis_path)
    say(f"fitted {basis.rank} components to {stack.n_images} reference frames "
        f"({stack.width}x{stack.height}); they explain "
        f"{100 * basis.explained_variance_ratio.sum():.1f}% of the variance")
    figures = {"quality_curves.png": plot_quality_curves(choice),
               "mean.png": plot_mean_image(basis),
               "components.png": plot_components(basis, count=16),
               "spectrum.png": plot_spectrum(basis)}
    labels = json.loads((source / "labels.json").read_text())
    shown = [f for f in labels["batch"] if f["kind"] in ("scratch", "dent", "particle")][:3]
    batch = read_images([source / f["file"] for f in shown])
    coef = basis.encode(batch.pixels)
    ranks = sorted({5, basis.rank})
    for i, frame in enumerate(shown):
        recs = {r: basis.decode(coef[i:i + 1, :r])[0].reshape(batch.image_shape)
                for r in ranks}
        name = Path(frame["file"]).stem
        figures[f"rebuild_{name}.png"] = plot_rebuild_panel(
            batch.images(i), recs, bit_depth=batch.bit_depth,
            title=f"batch frame {name} ({frame['kind']}, box {frame['box']}): the defect "
                  "stays in the error map")
    written = [basis_path]
    for name, fig in figures.items():
        save_figure(fig, output / name)
        written.append(output / name)
    screening = _demo_screen(stack, source, labels, output / "screen", say=say,
                             progress=progress)
    written += screening.pop("written")
    for path in written:
        say(f"wrote {path}")
    say("Screening is an aid to inspection, not an acceptance decision; lossy "
        "reconstructions are no substitute for the original images.")
    return {"images": stack.n_images, "rank": basis.rank, "rules": rules,
            "basis": str(basis_path), "source": str(source), "screen": screening,
            "written": [str(p) for p in written]}


def _demo_screen(reference, source, labels, folder, *, say, progress, alpha=0.01):
    """Screen the demo batch against the reference; write chart, overlays and CSV."""
    import csv
    import io

    from .basis import fit_basis
    from .ingest import read_images
    from .plots import plot_control_chart, residual_overlay, save_figure
    from .screen import CAUTION, calibrate, screen_images

    folder.mkdir(parents=True, exist_ok=True)
    batch = read_images(source / "batch", progress=progress)
    from dataclasses import replace

    calibration = calibrate(reference, alpha=alpha, align=True)
    aligned, _ = calibration.prepare(reference.pixels, reference.image_shape)
    basis = fit_basis(replace(reference, pixels=aligned), rank=calibration.rank)
    result = screen_images(basis, batch, calibration)
    kinds = {Path(f["file"]).name: f["kind"] for f in labels["batch"]}
    truth = np.array([kinds[Path(p).name] != "good" for p in batch.paths])
    flagged = result.flagged
    limits = calibration.limits()
    fig = plot_control_chart(result.q, result.t2, result.local, limits, flagged=flagged,
                             title=f"Demo batch: {int(flagged.sum())} of {len(flagged)} "
                                   f"frames flagged (alpha {alpha:g}, rank "
                                   f"{calibration.rank})", note=CAUTION)
    written = [folder / "control_chart.png"]
    save_figure(fig, written[0])
    for i in np.flatnonzero(flagged):
        img = residual_overlay(batch.images(i), result.maps[i], box=result.box[i],
                               peak=result.peak[i], limit=calibration.local_limit)
        path = folder / f"flagged_{Path(batch.paths[i]).stem}.png"
        write_image(path, img / 255.0, compress_level=1)
        written.append(path)
    buffer = io.StringIO()
    table = csv.writer(buffer, lineterminator="\n")
    table.writerow(["path", "kind", "flagged", "reasons", "peak", "box", "shift"])
    for i, p in enumerate(batch.paths):
        table.writerow([p, kinds[Path(p).name], int(flagged[i]), ";".join(result.reasons[i]),
                        " ".join(map(str, result.peak[i] or [])),
                        " ".join(map(str, result.box[i] or [])),
                        " ".join(f"{v:.2f}" for v in result.shift[i])])
    write_text(folder / "screen.csv", buffer.getvalue())
    written.append(folder / "screen.csv")
    caught, false_alarms = int((flagged & truth).sum()), int((flagged & ~truth).sum())
    say(f"screened {len(flagged)} batch frames at alpha {alpha:g} (aligned, rank "
        f"{calibration.rank}, limits by 5-fold over the reference): {int(flagged.sum())} "
        f"flagged, {caught} of the {int(truth.sum())} defective frames and "
        f"{false_alarms} of the {int((~truth).sum())} good ones")
    return {"alpha": alpha, "rank": calibration.rank, "flagged": int(flagged.sum()),
            "defective_caught": caught, "defective": int(truth.sum()),
            "false_alarms": false_alarms, "good": int((~truth).sum()), "written": written}


if __name__ == "__main__":
    if sys.argv[1:] != ["--regenerate"]:
        sys.exit("usage: python -m imgreduce.demo --regenerate")
    target = Path(__file__).resolve().parent.parent / "demo_images"
    generate_demo_images(target)
    print(f"wrote {target}")
