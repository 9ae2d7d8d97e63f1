"""Command line: ``imgreduce COMMAND ...``.

Every command accepts ``--json`` (one JSON document on stdout, nothing else there) and
``--quiet``. Exit codes: 0 success, 1 the tool's own error (bad input, mismatched model),
2 usage error, 3 from ``screen --fail-on-flag`` when an image is flagged. Library code
raises :class:`~imgreduce.errors.ImgreduceError`; this module prints it on one line.
"""

import argparse
import json
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
_COMMANDS = [_add_fit, _add_show, _add_demo]


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
