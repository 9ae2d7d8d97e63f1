"""Command line: ``imgreduce COMMAND ...``.

Every command accepts ``--json`` (one JSON document on stdout, nothing else there) and
``--quiet``. Exit codes: 0 success, 1 the tool's own error (bad input, mismatched model),
2 usage error, 3 from ``screen --fail-on-flag`` when an image is flagged. Library code
raises :class:`~imgreduce.errors.ImgreduceError`; this module prints it on one line.
"""

import argparse
import json
import math
import sys
import time
from pathlib import Path

from . import __version__
from .errors import ImgreduceError, ParameterError

__all__ = ["main", "get_parser"]

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_FLAGGED = 0, 1, 2, 3


# -- shared helpers ----------------------------------------------------------------------
class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keep the examples' line breaks and show defaults."""


def _size_type(text):
    from .ingest import parse_size

    try:
        return parse_size(text)
    except ParameterError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _positive_int(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {value}")
    return value


def _common(parser):
    group = parser.add_argument_group("output")
    group.add_argument("--json", action="store_true",
                       help="print one JSON document on stdout (progress and warnings "
                            "go to stderr)")
    group.add_argument("--quiet", "-q", action="store_true",
                       help="no progress bars, no messages except errors")


def _source_options(parser):
    """SRC and the options that say how to read it (shared by every command that ingests)."""
    parser.add_argument("src", nargs="+", metavar="SRC",
                        help="a folder of images, or image files")
    group = parser.add_argument_group("reading images")
    group.add_argument("--recursive", "-r", action="store_true",
                       help="also read images in sub-folders")
    group.add_argument("--color", choices=("gray", "rgb"), default=None,
                       help="convert every image to gray (ITU-R BT.601 luma) or RGB; "
                            "default: keep the files' own mode, which must agree")
    group.add_argument("--size", type=_size_type, default=None, metavar="WxH",
                       help="resample every image to W x H pixels; default: all images "
                            "must already share one size")
    group.add_argument("--bits", type=int, default=None, metavar="B",
                       help="significant bits per sample (e.g. 12 for 12-bit data in "
                            "16-bit files); default: the files' storage depth")
    group.add_argument("--strict", action="store_true",
                       help="stop on the first unreadable file instead of skipping it")
    group.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                       help="decoding threads (default: up to 4)")


def _progress(args):
    return not (args.quiet or args.json)


def _say(args, text):
    """A line for the person at the terminal (stderr in --json mode, never with --quiet)."""
    if args.quiet:
        return
    print(text, file=sys.stderr if args.json else sys.stdout)


def _warn(args, text):
    if not args.quiet:
        print(f"imgreduce: warning: {text}", file=sys.stderr)


def _emit_json(args, document):
    if args.json:
        json.dump(document, sys.stdout, indent=2, allow_nan=False, default=_json_default)
        sys.stdout.write("\n")


def _json_default(value):
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def _read_source(args):
    """Ingest SRC with the reading options; report rejected files as warnings."""
    from .ingest import read_images

    stack = read_images(args.src if len(args.src) > 1 else args.src[0], color=args.color,
                        size=args.size, recursive=args.recursive, strict=args.strict,
                        bits=args.bits, workers=args.workers, progress=_progress(args))
    for item in stack.rejected:
        _warn(args, f"skipped {item.path}: {item.reason}")
    if stack.rejected:
        _warn(args, f"{len(stack.rejected)} file(s) skipped, {stack.n_images} read "
                    "(use --strict to stop instead)")
    return stack


def _output_file(path, *, suffix, overwrite, what):
    """Validate an output file name: right suffix, folder exists, no silent overwrite."""
    path = Path(path)
    if path.suffix.lower() != suffix:
        raise ParameterError(f"{what} {path} should end in {suffix} "
                             f"(for example {path.with_suffix(suffix).name})")
    if path.is_dir():
        raise ParameterError(f"{what} {path} is a folder; give a file name ending in {suffix}")
    if not path.parent.exists():
        raise ParameterError(f"cannot write {path}: folder {path.parent} does not exist")
    if path.exists() and not overwrite:
        raise ParameterError(f"{path} already exists; use --overwrite to replace it")
    return path


def _output_dir(path, *, sources=()):
    """Create (if needed) an output folder that is not one of the source folders."""
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise ParameterError(f"-o {path} is a file; give a folder for the outputs")
    resolved = path.resolve()
    for src in sources:
        src = Path(src)
        if src.is_dir() and src.resolve() == resolved:
            raise ParameterError(f"-o {path} is the input folder; write outputs elsewhere so "
                                 "they are not read back as images")
    path.mkdir(parents=True, exist_ok=True)
    return path


def _load_basis(path):
    from .basis import EigenBasis

    return EigenBasis.load(path)


# -- commands ----------------------------------------------------------------------------
def _cmd_fit(args):
    from .basis import fit_basis

    out = _output_file(args.output, suffix=".npz", overwrite=args.overwrite,
                       what="basis file")
    started = time.perf_counter()
    stack = _read_source(args)
    basis = fit_basis(stack, rank=args.rank, seed=args.seed, exact=True if args.exact else None,
                      power_iterations=args.power_iterations, progress=_progress(args))
    basis.save(out)
    seconds = time.perf_counter() - started
    ratio = basis.explained_variance_ratio
    if basis.rank < basis.metadata.get("rank_requested", basis.rank):
        _warn(args, f"the images support only {basis.rank} components (asked for "
                    f"{basis.metadata['rank_requested']}): the rest would be numerical noise")
    _say(args, f"fitted {basis.rank} components to {stack.n_images} images of "
               f"{stack.width}x{stack.height} ({stack.color}, {stack.bit_depth}-bit) in "
               f"{seconds:.1f} s; they explain {100 * ratio.sum():.1f}% of the variance")
    _say(args, f"wrote {out}")
    _emit_json(args, {
        "images": stack.n_images,
        "rejected": [{"path": r.path, "reason": r.reason} for r in stack.rejected],
        "height": stack.height, "width": stack.width, "channels": stack.channels,
        "rank": basis.rank,
        "singular_values": basis.singular_values.tolist(),
        "explained_variance_ratio": ratio.tolist(),
        "seconds": round(seconds, 3),
        "method": basis.metadata["method"], "output": str(out),
    })
    return EXIT_OK


def _cmd_show(args):
    from .plots import plot_components, plot_mean_image, plot_spectrum, save_figure

    basis = _load_basis(args.basis)
    out = _output_dir(args.output)
    count = min(args.count, basis.rank)
    written = []
    for name, make in (("mean.png", lambda: plot_mean_image(basis)),
                       ("components.png", lambda: plot_components(basis, count=count)),
                       ("spectrum.png", lambda: plot_spectrum(basis))):
        path = out / name
        save_figure(make(), path)
        written.append(str(path))
        _say(args, f"wrote {path}")
    _emit_json(args, {"basis": str(args.basis), "rank": basis.rank, "count": count,
                      "written": written})
    return EXIT_OK


def _ranks_type(text):
    try:
        ranks = sorted({int(part) for part in text.split(",") if part.strip()})
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected ranks separated by commas (for example 5,20,50), got {text!r}") from None
    if not ranks or ranks[0] < 1:
        raise argparse.ArgumentTypeError(f"ranks must be whole numbers >= 1, got {text!r}")
    return ranks


def _finite(value, digits=4):
    """A float for JSON/CSV: rounded, and None where it is missing, infinite or undefined."""
    if value is None:
        return None
    value = float(value)
    return round(value, digits) if math.isfinite(value) else None


def _write_csv(path, header, rows):
    import csv
    import io

    from ._files import write_text

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if v is None else v for v in row])
    write_text(path, buffer.getvalue())


def _cmd_rebuild(args):
    import numpy as np

    from ._files import write_image
    from .plots import plot_rebuild_panel, save_figure
    from .quality import reconstruction_metrics

    basis = _load_basis(args.basis)
    too_big = [r for r in args.ranks if r > basis.rank]
    if too_big:
        raise ParameterError(f"--ranks {','.join(map(str, too_big))}: the basis {args.basis} "
                             f"holds {basis.rank} components; use ranks up to {basis.rank}")
    stack = _read_source(args)
    basis.check_compatible(stack, what=f"the images in {' '.join(args.src)}")
    out = _output_dir(args.output, sources=args.src)
    panels = min(args.limit, stack.n_images) if args.limit is not None else min(
        12, stack.n_images)
    rows, summary, written = [], [], []
    names = [Path(p).stem for p in stack.paths]
    if len(set(names)) < len(names):  # same stem in different folders: keep them apart
        names = [f"{i + 1:05d}_{n}" for i, n in enumerate(names)]
    per_rank = {}
    coef = basis.encode(stack.pixels, rank=max(args.ranks))
    for r in args.ranks:
        rec = basis.decode(coef[:, :r], rank=r)
        m = reconstruction_metrics(stack.pixels, rec, image_shape=stack.image_shape)
        per_rank[r] = m
        if args.save_images:
            folder = out / f"rank_{r:03d}"
            folder.mkdir(exist_ok=True)
            suffix = ".tif" if stack.channels == 3 and stack.bit_depth > 8 else ".png"
            for i in range(stack.n_images):
                write_image(folder / (names[i] + suffix), rec[i].reshape(stack.image_shape),
                            bit_depth=8 if stack.bit_depth <= 8 else 16)
            written.append(str(folder))
        summary.append({"rank": r, "psnr_mean": _finite(np.mean(m["psnr"])),
                        "psnr_min": _finite(np.min(m["psnr"])),
                        "ssim_mean": _finite(np.mean(m["ssim"])),
                        "clipped_fraction": _finite(np.mean(m["clipped_fraction"]), 6)})
    for i, path in enumerate(stack.paths):
        for r in args.ranks:
            m = per_rank[r]
            rows.append([path, r, _finite(m["psnr"][i]), _finite(m["ssim"][i], 5),
                         _finite(m["max_abs_error"][i], 6), _finite(m["rmse"][i], 6),
                         _finite(m["clipped_fraction"][i], 6)])
    csv_path = out / "metrics.csv"
    _write_csv(csv_path, ["path", "rank", "psnr", "ssim", "max_abs_error", "rmse",
                          "clipped_fraction"], rows)
    written.append(str(csv_path))
    for i in range(panels):
        recs = {r: basis.decode(coef[i:i + 1, :r], rank=r)[0].reshape(stack.image_shape)
                for r in args.ranks}
        fig = plot_rebuild_panel(stack.images(i), recs, bit_depth=stack.bit_depth,
                                 title=f"{Path(stack.paths[i]).name}: "
                                       + ", ".join(f"rank {r} {_finite(per_rank[r]['psnr'][i], 1)} dB"
                                                   for r in args.ranks))
        path = out / f"panel_{names[i]}.png"
        save_figure(fig, path)
        written.append(str(path))
    for item in summary:
        _say(args, f"rank {item['rank']:>4}: PSNR mean {item['psnr_mean']} dB, worst "
                   f"{item['psnr_min']} dB, SSIM mean {item['ssim_mean']}, clipped "
                   f"{100 * (item['clipped_fraction'] or 0):.3f}% of pixel values")
    _say(args, f"wrote {csv_path} and {panels} panel(s) in {out}")
    _emit_json(args, {
        "basis": str(args.basis), "images": stack.n_images, "ranks": args.ranks,
        "summary": summary, "written": written,
        "metrics": [dict(zip(("path", "rank", "psnr", "ssim", "max_abs_error", "rmse",
                              "clipped_fraction"), row)) for row in rows],
    })
    return EXIT_OK


def _cmd_choose(args):
    import numpy as np

    from .quality import choose_rank

    basis = _load_basis(args.basis) if args.basis else None
    stack = _read_source(args)
    if basis is not None:
        basis.check_compatible(stack, what=f"the images in {' '.join(args.src)}")
    out = _output_dir(args.output, sources=args.src) if args.output else None
    choice = choose_rank(stack.pixels, image_shape=stack.image_shape, basis=basis,
                         target_psnr=args.target_psnr, target_ssim=args.target_ssim,
                         variance=args.variance, max_rank=args.max_rank, folds=args.folds,
                         seed=args.seed, progress=_progress(args))
    curve = choice.curve
    summary = curve.summary()
    points = [{"rank": int(k), "explained": _finite(curve.explained[k], 6),
               "psnr_mean": _finite(summary["psnr_mean"][k]),
               "psnr_p05": _finite(summary["psnr_p05"][k]),
               "psnr_min": _finite(summary["psnr_min"][k])} for k in range(1, curve.max_rank + 1)]
    rules = {name: {k: (_finite(v, 6) if isinstance(v, float) else v) for k, v in rule.items()}
             for name, rule in choice.rules.items()}
    units = {"psnr": " dB", "ssim": "", "variance": " of the variance"}[choice.rule]
    how = ("held-out images (%d-fold cross-validation)" % curve.extra.get("folds", 0)
           if curve.held_out else f"images scored by {args.basis}")
    if choice.target_met:
        _say(args, f"recommended rank {choice.rank}: the smallest whose 5th-percentile image "
                   f"meets {choice.target:g}{units} ({how})" if choice.rule != "variance" else
                   f"recommended rank {choice.rank}: the smallest explaining "
                   f"{100 * choice.target:g}% of the variance")
    else:
        _warn(args, f"no rank up to {curve.max_rank} meets {choice.target:g}{units}; reporting "
                    f"{choice.rank} (raise --max-rank, or lower the target)")
    at = points[choice.rank - 1]
    _say(args, f"at rank {choice.rank}: PSNR mean {at['psnr_mean']} dB, 5th percentile "
               f"{at['psnr_p05']} dB, worst {at['psnr_min']} dB")
    for name, label in (("gavish_donoho", "Gavish-Donoho noise floor"),
                        ("broken_stick", "broken-stick rule"), ("psnr", "PSNR target"),
                        ("variance", "variance fraction"), ("ssim", "SSIM target")):
        if name in rules and name != choice.rule:
            _say(args, f"  {label}: rank {rules[name]['rank']}")
    written = []
    if out is not None:
        from .plots import plot_quality_curves, plot_rank_strip, save_figure

        save_figure(plot_quality_curves(choice), out / "quality_curves.png")
        p05 = curve.mse[:, choice.rank]
        worst = int(np.argmax(p05))
        typical = int(np.argsort(p05)[len(p05) // 2])
        picks = [typical, worst]
        recs = curve.reconstruct(picks, choice.rank)
        labels = [f"typical ({Path(stack.paths[typical]).name})",
                  f"worst ({Path(stack.paths[worst]).name})"]
        save_figure(plot_rank_strip([stack.images(i) for i in picks],
                                    [r.reshape(stack.image_shape) for r in recs], labels,
                                    rank=choice.rank), out / "rank_strip.png")
        _write_csv(out / "curve.csv", ["rank", "explained", "psnr_mean", "psnr_p05", "psnr_min"],
                   [[p[k] for k in ("rank", "explained", "psnr_mean", "psnr_p05", "psnr_min")]
                    for p in points])
        written = [str(out / n) for n in ("quality_curves.png", "rank_strip.png", "curve.csv")]
        for path in written:
            _say(args, f"wrote {path}")
    _emit_json(args, {
        "rank": choice.rank, "rule": choice.rule, "target": choice.target,
        "target_met": choice.target_met, "held_out": curve.held_out,
        "folds": curve.extra.get("folds"), "images": stack.n_images,
        "curve": points, "rules": rules, "ssim": choice.ssim, "written": written,
    })
    return EXIT_OK


def _alpha_type(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1, got {text!r}") \
            from None
    if not 0 < value < 0.5:
        raise argparse.ArgumentTypeError(f"expected a false-alarm rate between 0 and 0.5 "
                                         f"(for example 0.01), got {value:g}")
    return value


def _reading(args):
    return dict(color=args.color, size=args.size, recursive=args.recursive,
                strict=args.strict, bits=args.bits, workers=args.workers)


def _read_reference(args):
    from .ingest import read_images

    stack = read_images(args.reference, progress=_progress(args), **_reading(args))
    for item in stack.rejected:
        _warn(args, f"skipped reference file {item.path}: {item.reason}")
    return stack


def _screen_chunks(args, basis, calibration, files, sink):
    """Read SRC `files` chunk by chunk and screen each; return rejected files.

    The next chunk is decoded in a background thread while the current one is scored
    (decoding and the numpy kernels both release the GIL), so memory holds at most two
    chunks of images.
    """
    from concurrent.futures import ThreadPoolExecutor

    from ._progress import progress_bar
    from .errors import InputError
    from .ingest import read_images
    from .screen import Screener

    screener = Screener(basis, calibration)
    rejected = []
    what = f"the images in {' '.join(args.src)}"
    parts = [files[i:i + args.chunk] for i in range(0, len(files), args.chunk)]

    def read(part):
        try:
            return read_images(part, min_images=1, **{**_reading(args), "recursive": False})
        except InputError as exc:
            if "usable image" not in str(exc):
                raise
            return None

    with progress_bar(_progress(args), total=len(files), desc="screening",
                      unit="img") as bar, ThreadPoolExecutor(1) as pool:
        pending = pool.submit(read, parts[0]) if parts else None
        for k, part in enumerate(parts):
            stack = pending.result()
            pending = pool.submit(read, parts[k + 1]) if k + 1 < len(parts) else None
            if stack is None:
                rejected += [(str(p), "could not be read") for p in part]
            else:
                rejected += [(r.path, r.reason) for r in stack.rejected]
                basis.check_compatible(stack, what=f"{what} (from {stack.paths[0]} on)"
                                       if k else what)
                sink(stack, screener.screen(stack.pixels))
            bar.update(len(part))
    return rejected


def _write_screen_files(args, out, rows, calibration, mode, n_flagged):
    """screen.csv, control_chart.png and summary.txt in `out`; their paths."""
    from ._files import write_text
    from .plots import plot_control_chart, save_figure
    from .screen import CAUTION

    limits = calibration.limits()
    written = []

    def fmt(pair):
        return "" if pair is None else " ".join(str(v) for v in pair)

    csv_path = out / "screen.csv"
    _write_csv(csv_path, ["path", "q", "q_limit", "t2", "t2_limit", "local", "local_limit",
                          "flagged", "reasons", "peak", "box", "shift", "shift_d2",
                          "shift_limit"],
               [[r["path"], _finite(r["q"], 6), _finite(limits["q_limit"], 6),
                 _finite(r["t2"], 4), _finite(limits["t2_limit"], 4),
                 _finite(r["local"], 3), _finite(limits["local_limit"], 3),
                 int(bool(r["reasons"])), ";".join(r["reasons"]), fmt(r["peak"]),
                 fmt(r["box"]), fmt(r["shift"]), _finite(r["shift_d2"], 3),
                 _finite(limits["shift_limit"], 3)] for r in rows])
    written.append(str(csv_path))
    fig = plot_control_chart([r["q"] for r in rows], [r["t2"] for r in rows],
                             [r["local"] for r in rows], limits,
                             shift=([r["shift_d2"] for r in rows] if calibration.align
                                    else None),
                             flagged=[bool(r["reasons"]) for r in rows],
                             title=f"{n_flagged} of {len(rows)} images flagged "
                                   f"(alpha {args.alpha:g}, rank {calibration.rank}, "
                                   f"mode {mode})", note=CAUTION)
    chart = out / "control_chart.png"
    save_figure(fig, chart)
    written.append(str(chart))
    summary = out / "summary.txt"
    write_text(summary, "\n".join([
        f"imgreduce {__version__} screen: {len(rows)} images, {n_flagged} flagged",
        f"mode: {mode} (limits: {calibration.method})",
        f"alpha: {args.alpha:g} per good image (each of {len(calibration.statistics)} "
        f"statistics at alpha/{len(calibration.statistics)})",
        f"rank: {calibration.rank} ({calibration.details.get('rank_rule', 'stored')})",
        f"q_limit: {limits['q_limit']:.6g}", f"t2_limit: {limits['t2_limit']:.6g}",
        "local_limit: " + ("not used" if limits["local_limit"] is None
                           else f"{limits['local_limit']:.6g}"),
        "aligned: " + ("no" if not calibration.align else
                       f"yes, shift_limit {limits['shift_limit']:.6g} (squared "
                       "Mahalanobis distance from the reference frames' shifts)"),
        "", CAUTION, ""]))
    written.append(str(summary))
    return written


def _say_screen(args, rows, calibration, mode, out, n_flagged):
    """The console summary of a screening run: counts, flagged frames, warnings."""
    limits = calibration.limits()
    _say(args, f"screened {len(rows)} images ({mode} mode, limits {calibration.method}, "
               f"rank {calibration.rank}, alpha {args.alpha:g}): {n_flagged} flagged")
    shown = [r for r in rows if r["reasons"]][:20]
    for r in shown:
        ratio = {"Q": r["q"] / limits["q_limit"], "T2": r["t2"] / limits["t2_limit"],
                 "local": (r["local"] / limits["local_limit"]) if limits["local_limit"]
                 else float("nan"),
                 "shift": (r["shift_d2"] / limits["shift_limit"]) if limits["shift_limit"]
                 else float("nan")}
        why = ", ".join(f"{k} {ratio[k]:.1f}x limit" for k in r["reasons"])
        moved = (f"; moved {r['shift'][0]:+.2f}, {r['shift'][1]:+.2f} px (rows, cols) to "
                 "align" if r["shift"] is not None else "")
        _say(args, f"  {r['path']}: {why}; peak row {r['peak'][0]} col {r['peak'][1]}, "
                   f"box rows {r['box'][0]}-{r['box'][2] - 1} cols {r['box'][1]}-"
                   f"{r['box'][3] - 1}{moved}")
    if n_flagged > len(shown):
        _say(args, f"  ... and {n_flagged - len(shown)} more"
                   + (f" (see {out / 'screen.csv'})" if out else " (use -o DIR for the CSV)"))
    if calibration.method == "heldout" and calibration.details.get("level") == "parametric":
        need = math.ceil(1 / args.alpha - 1)
        _warn(args, f"{calibration.details.get('reference_images')} reference images are too "
                    f"few to set the limits' level at alpha {args.alpha:g} (that needs "
                    f"{need}): plain Box/Gumbel limits are used, and good frames may be "
                    "flagged at 2-3 times alpha; add known-good images or raise --alpha")
    if calibration.method == "analytic":
        _warn(args, "textbook limits from the reference's training eigenvalues: with far "
                    "more pixels than images they flag too many good frames")


def _cmd_screen(args):
    from ._files import write_image
    from .basis import fit_basis
    from .ingest import find_images
    from .plots import residual_overlay
    from .screen import (CAUTION, Calibration, calibrate, calibrate_on_batch,
                         screen_batch)

    started = time.perf_counter()
    if args.align and not args.reference:
        raise ParameterError("--align needs --reference DIR: the template and the placement "
                             "limits come from known-good frames (a basis saved by "
                             "'--reference DIR --align --save-basis' aligns by itself)")
    if args.align and args.limits == "analytic":
        raise ParameterError("--align works with --limits heldout or box, not analytic")
    if args.limits == "analytic" and not args.reference:
        raise ParameterError("--limits analytic needs --reference DIR (the textbook limits "
                             "come from the reference images' eigenvalues)")
    if args.reference and any(Path(args.reference).resolve() == Path(s).resolve()
                              for s in args.src):
        raise ParameterError("--reference is the folder being screened; give known-good "
                             "images the screened batch does not contain, or leave "
                             "--reference out to screen the batch against itself")
    save_to = (_output_file(args.save_basis, suffix=".npz", overwrite=args.overwrite,
                            what="--save-basis file") if args.save_basis else None)
    out = _output_dir(args.output, sources=args.src) if args.output else None
    basis = _load_basis(args.basis) if args.basis else None
    if basis is not None and args.rank is not None and args.rank > basis.rank:
        raise ParameterError(f"--rank {args.rank}: the basis {args.basis} holds {basis.rank} "
                             f"components; use --rank {basis.rank} or less")
    stored = Calibration.from_basis(basis) if basis is not None else None
    files = find_images(args.src if len(args.src) > 1 else args.src[0],
                        recursive=args.recursive)
    if basis is not None and basis.metadata.get("source_digest") and not args.reference:
        import hashlib

        digest = hashlib.sha256("\n".join(str(p) for p in files).encode()).hexdigest()
        if digest == basis.metadata["source_digest"]:
            raise ParameterError(
                f"{args.basis} was fitted on these very images: their residuals are shrunk "
                "and their scores would look better than new frames'. Screen other "
                "images, add --reference DIR of known-good ones, or leave --basis out")

    rows, maps_done, written = [], [0], []
    flagged_paths, rejected = [], []
    names_seen = {}
    overlay_dir = out / "flagged" if out else None

    def sink(stack, chunk):
        for i, path in enumerate(stack.paths):
            shift = chunk.get("shift")
            rows.append({"path": path, "q": float(chunk["q"][i]), "t2": float(chunk["t2"][i]),
                         "local": float(chunk["local"][i]), "reasons": chunk["reasons"][i],
                         "peak": chunk["peak"][i], "box": chunk["box"][i],
                         "shift": None if shift is None else [round(float(v), 3)
                                                              for v in shift[i]],
                         "shift_d2": (None if shift is None
                                      else float(chunk["shift_d2"][i]))})
            if not chunk["reasons"][i]:
                continue
            flagged_paths.append(path)
            if overlay_dir is None or maps_done[0] >= args.max_overlays:
                continue
            stem = Path(path).stem
            names_seen[stem] = names_seen.get(stem, 0) + 1
            name = stem if names_seen[stem] == 1 else f"{stem}_{names_seen[stem]}"
            overlay_dir.mkdir(exist_ok=True)
            img = residual_overlay(stack.images(i), chunk["maps"][i], box=chunk["box"][i],
                                   peak=chunk["peak"][i], limit=calibration.local_limit)
            write_image(overlay_dir / f"{name}.png", img / 255.0, compress_level=1)
            maps_done[0] += 1

    if args.reference:
        reference = _read_reference(args)
        if basis is not None:
            basis.check_compatible(reference, what=f"the reference images in {args.reference}")
        rank = args.rank
        if rank is None and basis is not None:
            from .screen import choose_screening_rank

            rank = min(choose_screening_rank(reference, seed=args.seed)[0], basis.rank)
        calibration = calibrate(reference, rank=rank, alpha=args.alpha, folds=args.folds,
                                seed=args.seed, limits=args.limits, align=args.align)
        if basis is not None:
            # The fold bases' eigenvalues describe a basis fitted on this reference; B's
            # components are its own.
            calibration.t2_eigenvalues = None
        if basis is None:
            if calibration.align:
                from dataclasses import replace

                aligned, _ = calibration.prepare(reference.pixels, reference.image_shape)
                reference = replace(reference, pixels=aligned)
            basis = fit_basis(reference, rank=calibration.rank, seed=args.seed)
        mode = "reference"
        calibration.attach(basis)
        rejected = _screen_chunks(args, basis, calibration, files, sink)
    elif basis is not None and stored is not None:
        if args.rank is not None and args.rank != stored.rank:
            raise ParameterError(f"{args.basis} carries limits calibrated at rank "
                                 f"{stored.rank}; drop --rank, or give --reference DIR to "
                                 "calibrate again")
        calibration, mode = stored, "basis"
        rejected = _screen_chunks(args, basis, calibration, files, sink)
    else:
        stack = _read_source(args)
        rejected = [(r.path, r.reason) for r in stack.rejected]
        if basis is not None:
            basis.check_compatible(stack, what=f"the images in {' '.join(args.src)}")
            calibration = calibrate_on_batch(basis, stack, rank=args.rank, alpha=args.alpha)
            calibration.attach(basis)
            mode = "batch"
        else:
            basis, _ = screen_batch(stack, rank=args.rank, alpha=args.alpha,
                                    folds=args.folds, seed=args.seed, maps=False)
            calibration = Calibration.from_basis(basis)
            mode = "self"
        from .screen import Screener

        sink(stack, Screener(basis, calibration).screen(stack.pixels))
    if not rejected:
        rejected = []
    for path, reason in rejected:
        _warn(args, f"skipped {path}: {reason}")
    if not rows:
        raise ParameterError("no image of SRC could be read; nothing was screened")

    limits = calibration.limits()
    n_flagged = len(flagged_paths)
    seconds = time.perf_counter() - started
    if save_to is not None:
        basis.save(save_to)
        written.append(str(save_to))
    if out is not None:
        written += _write_screen_files(args, out, rows, calibration, mode, n_flagged)
        if maps_done[0]:
            written.append(str(overlay_dir))
    if n_flagged and maps_done[0] < n_flagged and out is not None:
        _warn(args, f"overlays written for the first {maps_done[0]} of {n_flagged} flagged "
                    "images (raise --max-overlays for more)")

    _say_screen(args, rows, calibration, mode, out, n_flagged)
    for path in written:
        _say(args, f"wrote {path}")
    _say(args, CAUTION)
    _emit_json(args, {
        "alpha": args.alpha, "rank": calibration.rank, "mode": mode,
        "limits_method": calibration.method, **limits,
        "rank_rule": calibration.details.get("rank_rule"),
        "limit_scale": calibration.details.get("limit_scale"),
        "aligned": calibration.align,
        "images": [{"path": r["path"], "q": r["q"], "t2": r["t2"],
                    "local": r["local"] if math.isfinite(r["local"]) else None,
                    "flagged": bool(r["reasons"]), "reasons": r["reasons"],
                    "peak": r["peak"], "box": r["box"], "shift": r["shift"],
                    "shift_d2": r["shift_d2"]} for r in rows],
        "flagged": n_flagged,
        "rejected": [{"path": p, "reason": why} for p, why in rejected],
        "written": written, "seconds": round(seconds, 3), "caution": CAUTION,
    })
    return EXIT_FLAGGED if args.fail_on_flag and n_flagged else EXIT_OK


def _add_screen(sub):
    p = sub.add_parser("screen", help="flag frames that do not fit and show where",
                       description="Score each image by Q (squared residual), Hotelling's "
                                   "T^2 and a local residual statistic against limits "
                                   "calibrated on images the basis did not see; write "
                                   "screen.csv, a control chart and an overlay of the "
                                   "residual map for each flagged image.",
                       epilog=_EXAMPLES["screen"], formatter_class=_Formatter)
    _source_options(p)
    g = p.add_argument_group("model and limits")
    g.add_argument("--reference", metavar="DIR", default=None,
                   help="folder of known-good images of the same setup (read with the same "
                        "options as SRC): limits by k-fold over them")
    g.add_argument("--basis", "-b", metavar="BASIS.npz", default=None,
                   help="basis to screen with (it must not have been fitted on SRC)")
    g.add_argument("--rank", type=_positive_int, default=None, metavar="K",
                   help="components kept (default: Gavish-Donoho noise floor of the "
                        "reference, at most 50 and a quarter of its images)")
    g.add_argument("--alpha", type=_alpha_type, default=0.01, metavar="A",
                   help="aimed-at false-alarm rate per good image (default 0.01)")
    g.add_argument("--limits", choices=("heldout", "box", "analytic"), default="heldout",
                   help="heldout (default): Box/Gumbel fits to k-fold held-out values, "
                        "scaled so that held-out good frames exceed them at rate alpha; "
                        "box: the same fits at alpha/3 each, unscaled (more sensitive, "
                        "more false alarms when good frames vary in non-Gaussian ways); "
                        "analytic: Jackson-Mudholkar and F limits from the reference's "
                        "eigenvalues (textbook; flags too many frames when pixels far "
                        "outnumber images)")
    g.add_argument("--align", action="store_true",
                   help="move every frame onto the reference's mean by sub-pixel "
                        "translation before scoring, and screen the translation itself "
                        "(reason 'shift'); for parts that land a little differently under "
                        "a fixed camera (needs --reference; a saved basis keeps it)")
    g.add_argument("--folds", type=_positive_int, default=5, metavar="N",
                   help="k of the k-fold calibration (default 5)")
    g.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    o = p.add_argument_group("outputs")
    o.add_argument("-o", "--output", metavar="DIR", default=None,
                   help="folder for screen.csv, control_chart.png, summary.txt and "
                        "flagged/*.png overlays (created if missing)")
    o.add_argument("--save-basis", metavar="FILE.npz", default=None,
                   help="save the screening basis with its limits, for later runs with "
                        "--basis FILE.npz (one streamed pass, no recalibration)")
    o.add_argument("--overwrite", action="store_true",
                   help="replace an existing --save-basis file")
    o.add_argument("--max-overlays", type=int, default=1000, metavar="N",
                   help="overlay PNGs for at most N flagged images (default 1000)")
    o.add_argument("--chunk", type=_positive_int, default=256, metavar="N",
                   help="images read and scored at a time when streaming (default 256)")
    o.add_argument("--fail-on-flag", action="store_true",
                   help="exit with status 3 when any image is flagged (for pipelines)")
    _common(p)
    p.set_defaults(handler=_cmd_screen)


def _cmd_demo(args):
    from .demo import run_demo

    out = _output_dir(args.output)
    result = run_demo(out, progress=_progress(args), say=lambda line: _say(args, line))
    _say(args, f"done: open the PNG figures in {out}")
    _emit_json(args, result)
    return EXIT_OK


# -- parser ------------------------------------------------------------------------------
_EXAMPLES = {
    "fit": """examples:
  imgreduce fit line3/good/ -o line3.npz
  imgreduce fit scans/ --recursive --color gray --size 640x480 --rank 40 -o scans.npz --json""",
    "show": """examples:
  imgreduce show line3.npz -o line3-figures/
  imgreduce show line3.npz -o figs/ --count 25""",
    "rebuild": """examples:
  imgreduce rebuild line3/batch-0412/ --basis line3.npz --ranks 5,20,50 -o rebuilt/
  imgreduce rebuild scans/ --basis scans.npz --ranks 10,40 --limit 3 --save-images -o out/""",
    "choose": """examples:
  imgreduce choose line3/good/ --target-psnr 38
  imgreduce choose line3/batch-0412/ --basis line3.npz --target-ssim 0.95 -o choice/
  imgreduce choose scans/ --variance 0.9 --json""",
    "screen": """examples:
  imgreduce screen line3/batch-0412/ --reference line3/good/ -o screened/
  imgreduce screen line3/batch-0412/ --reference line3/good/ --align --save-basis line3-screen.npz
  imgreduce screen line3/batch-0413/ --basis line3-screen.npz --fail-on-flag --json
  imgreduce screen line3/batch-0412/ -o screened/          (no reference: robust self-fit)

modes (printed in the output as "mode"):
  reference  --reference DIR: limits from k-fold over known-good images; the screening
             basis is fitted on all of them (or is --basis B, checked against them)
  basis      --basis B carrying limits from an earlier run (--save-basis): one streamed
             pass over SRC, bounded memory
  batch      --basis B without limits: limits from SRC itself, scored by B, trimmed
  self       neither: basis and limits from SRC itself, trimmed robustly (a batch with
             up to about 10% defective frames)

Screening is an aid to inspection, not an acceptance decision: confirm flagged frames,
audit a sample of passed ones, validate detection on known defects before relying on it.""",
    "demo": """examples:
  imgreduce demo
  imgreduce demo -o /tmp/imgreduce-demo --json""",
}


def _add_fit(sub):
    p = sub.add_parser("fit", help="read images and fit an eigen-image basis",
                       description="Read a set of same-size images and fit a basis of "
                                   "eigen-images (principal components) by randomized SVD.",
                       epilog=_EXAMPLES["fit"], formatter_class=_Formatter)
    _source_options(p)
    p.add_argument("-o", "--output", required=True, metavar="BASIS.npz",
                   help="where to write the basis")
    p.add_argument("--rank", "-k", type=_positive_int, default=None, metavar="K",
                   help="number of components (default: min(n - 1, 100))")
    p.add_argument("--seed", type=int, default=0, help="random seed (default: 0)")
    p.add_argument("--exact", action="store_true",
                   help="exact SVD instead of the randomized one (small problems)")
    p.add_argument("--power-iterations", type=int, default=2, metavar="N",
                   help="subspace iterations of the randomized SVD (default: 2; raise for "
                        "spectra that are flat around K)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing BASIS.npz")
    _common(p)
    p.set_defaults(handler=_cmd_fit)


def _add_show(sub):
    p = sub.add_parser("show", help="draw a basis: mean image, basis images, spectrum",
                       description="Draw the mean image, a montage of the first basis images "
                                   "and the spectrum of a saved basis as PNG figures.",
                       epilog=_EXAMPLES["show"], formatter_class=_Formatter)
    p.add_argument("basis", metavar="BASIS.npz", help="a basis written by 'imgreduce fit'")
    p.add_argument("-o", "--output", required=True, metavar="DIR",
                   help="folder for the figures (created if missing)")
    p.add_argument("--count", type=_positive_int, default=16, metavar="N",
                   help="basis images in the montage (default: 16)")
    _common(p)
    p.set_defaults(handler=_cmd_show)


def _add_rebuild(sub):
    p = sub.add_parser("rebuild", help="reconstruct images at chosen ranks, with error maps",
                       description="Reconstruct images from a basis at several ranks: panel "
                                   "figures with error maps, and PSNR, SSIM, RMSE and max "
                                   "error per image and rank in metrics.csv.",
                       epilog=_EXAMPLES["rebuild"], formatter_class=_Formatter)
    _source_options(p)
    p.add_argument("--basis", "-b", required=True, metavar="BASIS.npz",
                   help="basis to reconstruct from (fitted on these or on other images)")
    p.add_argument("--ranks", type=_ranks_type, default=[5, 20, 50], metavar="K1,K2,...",
                   help="ranks to reconstruct at (default: 5,20,50)")
    p.add_argument("--limit", type=_positive_int, default=None, metavar="N",
                   help="panel figures for the first N images (default: 12; metrics cover "
                        "all images)")
    p.add_argument("--save-images", action="store_true",
                   help="also write every reconstruction (clipped to the file range) under "
                        "DIR/rank_K/")
    p.add_argument("-o", "--output", required=True, metavar="DIR",
                   help="folder for panels and metrics.csv (created if missing)")
    _common(p)
    p.set_defaults(handler=_cmd_rebuild)


def _add_choose(sub):
    p = sub.add_parser("choose", help="quality against rank, and a recommended rank",
                       description="Quality-vs-rank curves on images the basis did not see "
                                   "(k-fold over SRC, or a basis fitted on other images) "
                                   "and the smallest rank whose 5th-percentile image meets "
                                   "a target; the Gavish-Donoho and broken-stick ranks are "
                                   "reported beside it.",
                       epilog=_EXAMPLES["choose"], formatter_class=_Formatter)
    _source_options(p)
    p.add_argument("--basis", "-b", default=None, metavar="BASIS.npz",
                   help="score SRC with this basis (fitted on other images) instead of k-fold")
    target = p.add_mutually_exclusive_group()
    target.add_argument("--target-psnr", type=float, default=None, metavar="DB",
                        help="PSNR the 5th-percentile image must reach (default: 40 dB)")
    target.add_argument("--target-ssim", type=float, default=None, metavar="S",
                        help="SSIM the 5th-percentile image must reach (e.g. 0.95)")
    target.add_argument("--variance", type=float, default=None, metavar="F",
                        help="smallest rank explaining this fraction of the variance (e.g. 0.9)")
    p.add_argument("--max-rank", type=_positive_int, default=None, metavar="K",
                   help="largest rank tried (default: up to 100)")
    p.add_argument("--folds", type=int, default=5, metavar="N",
                   help="cross-validation folds without --basis (default: 5)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default: 0)")
    p.add_argument("-o", "--output", default=None, metavar="DIR",
                   help="also write quality_curves.png, rank_strip.png and curve.csv here")
    _common(p)
    p.set_defaults(handler=_cmd_choose)


def _add_demo(sub):
    p = sub.add_parser("demo", help="run the main job on the shipped demo images",
                       description="Fit a basis to the shipped demo images (an invented "
                                   "inspection line) and draw it.",
                       epilog=_EXAMPLES["demo"], formatter_class=_Formatter)
    p.add_argument("-o", "--output", default="imgreduce-demo", metavar="DIR",
                   help="folder for the results (default: ./imgreduce-demo)")
    _common(p)
    p.set_defaults(handler=_cmd_demo)


# Each entry adds one sub-command; keep the order of DESIGN.md.
_COMMANDS = [_add_fit, _add_show, _add_rebuild, _add_choose, _add_screen, _add_demo]


def get_parser():
    """The argparse parser of the ``imgreduce`` command."""
    parser = argparse.ArgumentParser(
        prog="imgreduce",
        description="Eigen-image bases for large sets of same-size images: compress at a "
                    "known quality, screen for frames that do not fit, choose the rank.",
        epilog="Run 'imgreduce COMMAND --help' for a command's options and examples.",
        formatter_class=_Formatter)
    parser.add_argument("--version", action="version", version=f"imgreduce {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for add in _COMMANDS:
        add(sub)
    return parser


def main(argv=None):
    """Run the command line; return the exit status."""
    parser = get_parser()
    args = parser.parse_args(argv)
    try:
        return args.handler(args)
    except ImgreduceError as exc:
        print(f"imgreduce: error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("imgreduce: interrupted; no partial output was left under a final name",
              file=sys.stderr)
        return 130
    except OSError as exc:
        # Writing outputs: permission denied, disk full, and the like.
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        print(f"imgreduce: error: {exc.strerror or exc}{where}", file=sys.stderr)
        return EXIT_ERROR
