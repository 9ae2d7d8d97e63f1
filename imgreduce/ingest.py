"""Finding, checking and decoding image files into one pixel matrix.

This is the only module that reads image files. It turns a folder (or a list of files) of
same-size images into an :class:`ImageStack`: an ``(n, p)`` float32 matrix with one image
per row, values ``value / (2**bits - 1)`` in [0, 1], and a manifest of accepted and
rejected files.

Policies, all explicit (PCA only makes sense when every pixel shares units and scale):

- **Colour.** By default every file must have the same colour class (gray or colour) and
  storage depth; mixing them is an error that names the odd files. ``color='gray'``
  converts colour files to luma with the ITU-R BT.601 weights (0.299 R + 0.587 G +
  0.114 B, what Pillow's ``L`` mode uses), computed in float so no precision is lost;
  ``color='rgb'`` gives three channels (gray files are replicated). Alpha is dropped;
  palette images become their RGB colours.
- **Size.** By default every image must have the same size; ``size=(w, h)`` resamples each
  one (Lanczos, on float data, then clipped to [0, 1]).
- **Depth.** 8- and 16-bit files are read exactly. ``bits=12`` scales 12-bit data held in
  16-bit containers by 4095 instead of 65535. 16-bit *colour* PNGs are refused with a
  clear reason: Pillow decodes them to 8 bits, which would silently lose data (save them
  as 16-bit TIFF, which is read exactly through tifffile).

Unreadable, truncated or non-image files among good ones are skipped and listed in
``ImageStack.rejected`` with the reason (``strict=True`` makes the first one an error);
the caller decides how to report them. Nothing is ever written next to the inputs.
"""

import os
import re
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._progress import progress_bar
from .errors import InputError, ParameterError

__all__ = ["ImageStack", "Rejected", "read_images", "find_images", "parse_size",
           "IMAGE_SUFFIXES"]

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".webp")
_TIFF = (".tif", ".tiff")
# Header-claimed pixel count above which a file is refused without decoding it.
DEFAULT_MAX_PIXELS = 2 ** 28
_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)


@dataclass(frozen=True)
class Rejected:
    """A file that was skipped, and why."""

    path: str
    reason: str


@dataclass(eq=False)
class ImageStack:
    """Images of one size and kind as rows of a float32 matrix.

    Attributes
    ----------
    pixels : ndarray, shape (n, p), float32
        One image per row, values in [0, 1]; may be a memory map.
    paths : list of str
        Accepted files in natural-sort (acquisition) order, one per row.
    image_shape : tuple of int
        ``(h, w)`` for gray, ``(h, w, 3)`` for RGB.
    bit_depth : int
        Bits used for scaling: ``value / (2**bit_depth - 1)``.
    color : {'gray', 'rgb'}
        What the rows hold.
    color_policy : {None, 'gray', 'rgb'}
        What was asked for (None: the files' own mode, which had to agree).
    size_policy : tuple of int or None
        ``(width, height)`` every image was resampled to, or None.
    rejected : list of Rejected
        Files that were skipped.
    """

    pixels: np.ndarray
    paths: list
    image_shape: tuple
    bit_depth: int
    color: str
    color_policy: object = None
    size_policy: object = None
    rejected: list = field(default_factory=list)

    @property
    def n_images(self):
        return self.pixels.shape[0]

    @property
    def n_pixels(self):
        return self.pixels.shape[1]

    @property
    def height(self):
        return self.image_shape[0]

    @property
    def width(self):
        return self.image_shape[1]

    @property
    def channels(self):
        return 3 if len(self.image_shape) == 3 else 1

    def images(self, idx=None):
        """Rows reshaped to images: ``(m, *image_shape)`` (or one image for an int)."""
        rows = self.pixels if idx is None else self.pixels[idx]
        if np.ndim(idx) == 0 and idx is not None:
            return rows.reshape(self.image_shape)
        return rows.reshape((-1,) + tuple(self.image_shape))

    def policy(self):
        """What a basis fitted on these images must match (JSON-ready)."""
        return {"image_shape": list(self.image_shape), "color": self.color,
                "color_policy": self.color_policy,
                "size_policy": list(self.size_policy) if self.size_policy else None,
                "bit_depth": self.bit_depth, "channels": self.channels}


def parse_size(text):
    """Parse ``"WxH"`` (or a ``(w, h)`` pair) into ``(width, height)``.

    Examples
    --------
    >>> parse_size("640x480")
    (640, 480)
    """
    if isinstance(text, (tuple, list)) and len(text) == 2:
        w, h = text
    else:
        match = re.fullmatch(r"\s*(\d+)\s*[xX×]\s*(\d+)\s*", str(text))
        if not match:
            raise ParameterError(f"size {text!r} is not of the form WxH (for example 640x480)")
        w, h = match.groups()
    w, h = int(w), int(h)
    if w < 1 or h < 1:
        raise ParameterError(f"size {w}x{h} must be at least 1x1")
    return w, h


def _natural_key(path):
    parts = re.split(r"(\d+)", str(path))
    return [int(p) if p.isdigit() else p.lower() for p in parts]


def _is_image_name(path):
    return path.suffix.lower() in IMAGE_SUFFIXES and not path.name.startswith(".")


def _collect(src, recursive):
    """The image files named by `src`, naturally sorted; InputError when there are none."""
    items = [src] if isinstance(src, (str, os.PathLike)) else list(src)
    if not items:
        raise InputError("no images given: name a folder or image files")
    files = []
    for item in items:
        path = Path(item)
        if not path.exists():
            raise InputError(f"{path}: no such file or folder")
        if path.is_dir():
            found = path.rglob("*") if recursive else path.iterdir()
            images = sorted((f for f in found if f.is_file() and _is_image_name(f)
                             and not any(part.startswith(".") for part in
                                         f.relative_to(path).parts)), key=_natural_key)
            if not images:
                others = any(f.is_file() for f in path.iterdir())
                hint = ("; it has sub-folders — add --recursive to read them"
                        if not recursive and any(f.is_dir() for f in path.iterdir()) else "")
                what = "no image files" if others or hint else "nothing (empty folder)"
                raise InputError(f"{path} holds {what} (looked for "
                                 f"{', '.join(IMAGE_SUFFIXES)}){hint}")
            files.extend(images)
        else:
            files.append(path)
    return files


def find_images(src, *, recursive=False):
    """The image files `src` names, in natural order, without reading them.

    For streaming large sets: pass slices of this list to :func:`read_images`.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> for name in ("b10.png", "b9.png", "notes.txt"):
    ...     _ = (folder / name).write_bytes(b"")
    >>> [p.name for p in find_images(folder)]
    ['b9.png', 'b10.png']
    """
    return _collect(src, recursive)


@dataclass
class _Probe:
    """What a file's header says: enough to check a set before decoding any of it."""

    kind: str = ""       # 'gray' or 'rgb' (native class)
    bits: int = 0        # storage depth: 8 or 16
    size: tuple = ()     # (width, height)
    reader: str = "pil"  # 'pil' or 'tiff'
    reason: str = ""     # non-empty when the file cannot be used


def _png_header(path):
    """(bit depth, colour type) from a PNG's IHDR chunk, or None."""
    with open(path, "rb") as fh:
        head = fh.read(33)
    if len(head) < 33 or head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        return None
    return head[24], head[25]


def _probe(path, max_pixels):
    from PIL import Image, UnidentifiedImageError

    try:
        if path.suffix.lower() in _TIFF:
            return _probe_tiff(path, max_pixels)
        with warnings.catch_warnings():
            # Our own limit below replaces Pillow's bomb warning.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            with Image.open(path) as im:
                mode, size = im.mode, im.size
        if size[0] * size[1] > max_pixels:
            return _Probe(reason=f"header claims {size[0]}x{size[1]} pixels, above the "
                                 f"limit of {max_pixels} (a decompression bomb or a wrong file)")
        png = _png_header(path) if path.suffix.lower() == ".png" else None
        if png and png[0] == 16 and png[1] in (2, 6):
            return _Probe(reason="16-bit colour PNG: the decoder would reduce it to 8 bits "
                                 "(save it as 16-bit TIFF to keep every bit)")
        if mode in ("1", "L", "LA"):
            return _Probe("gray", 8, size)
        if mode.startswith("I;16") or (mode == "I" and png and png[0] == 16):
            return _Probe("gray", 16, size)
        if mode in ("RGB", "RGBA", "P", "PA", "CMYK", "YCbCr", "LAB", "HSV"):
            return _Probe("rgb", 8, size)
        return _Probe(reason=f"unsupported pixel mode {mode!r} (only 8- and 16-bit integer "
                             "gray or colour images are read)")
    except Image.DecompressionBombError:
        return _Probe(reason=f"header claims an enormous image (a decompression bomb); "
                             f"the limit is {max_pixels} pixels")
    except UnidentifiedImageError:
        return _Probe(reason="not an image file (cannot identify its format)")
    except (OSError, ValueError, SyntaxError) as exc:
        return _Probe(reason=f"unreadable ({exc})")


def _probe_tiff(path, max_pixels):
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            page = tif.pages[0]
            shape, dtype = page.shape, page.dtype
    except Exception as exc:  # tifffile raises many types for damaged files
        return _Probe(reason=f"not a readable TIFF ({exc})")
    if len(shape) == 2:
        kind = "gray"
    elif len(shape) == 3 and shape[-1] in (3, 4):
        kind = "rgb"
    elif len(shape) == 3 and shape[-1] == 1:
        kind = "gray"
    else:
        return _Probe(reason=f"unsupported TIFF layout {shape} (expected H x W gray or "
                             "H x W x 3 colour)")
    if dtype not in (np.uint8, np.uint16):
        return _Probe(reason=f"unsupported TIFF sample type {dtype} (only 8- and 16-bit "
                             "unsigned integers)")
    h, w = shape[:2]
    if w * h > max_pixels:
        return _Probe(reason=f"header claims {w}x{h} pixels, above the limit of {max_pixels}")
    return _Probe(kind, 8 * np.dtype(dtype).itemsize, (w, h), "tiff")


def _decode(path, probe):
    """Integer sample array (h, w) or (h, w, 3) of one file, alpha dropped."""
    if probe.reader == "tiff":
        import tifffile

        arr = tifffile.imread(path, key=0)
        if arr.ndim == 3:
            arr = arr[..., :3] if arr.shape[-1] >= 3 else arr[..., 0]
        return arr
    from PIL import Image

    with Image.open(path) as im:
        im.load()
        if probe.kind == "gray":
            if im.mode in ("1", "LA"):
                im = im.convert("L")
            arr = np.asarray(im)
        else:
            if im.mode in ("P", "PA") and ("transparency" in im.info or im.mode == "PA"):
                im = im.convert("RGBA")
            arr = np.asarray(im.convert("RGB") if im.mode != "RGB" else im)
    return arr


def _to_float(arr, probe, *, color, scale, bits, size, path):
    """One decoded file as float32 in [0, 1], converted to the target colour and size."""
    if bits is not None and int(arr.max(initial=0)) > scale:
        raise InputError(f"{path} has sample value {int(arr.max())}, above {int(scale)} "
                         f"= 2**{bits} - 1 (remove --bits {bits} or check the files)")
    img = arr.astype(np.float32)
    img /= np.float32(scale)
    if color == "gray" and img.ndim == 3:
        img = img @ _LUMA
    elif color == "rgb" and img.ndim == 2:
        img = np.repeat(img[:, :, None], 3, axis=2)
    if size is not None and (img.shape[1], img.shape[0]) != tuple(size):
        img = _resample(img, size)
    return img


def _resample(img, size):
    from PIL import Image

    planes = [img] if img.ndim == 2 else [img[..., c] for c in range(img.shape[2])]
    out = [np.asarray(Image.fromarray(np.ascontiguousarray(p), mode="F").resize(
        tuple(size), Image.Resampling.LANCZOS)) for p in planes]
    res = out[0] if img.ndim == 2 else np.stack(out, axis=2)
    # Lanczos overshoots at edges; keep the [0, 1] pixel scale.
    return np.clip(res, 0.0, 1.0)


def _describe_groups(groups, label, total):
    """'640x480: 212 files (e.g. a.png); 641x480: 1 file (frame_017.png)'."""
    parts = []
    for key, files in sorted(groups.items(), key=lambda kv: -len(kv[1])):
        n = len(files)
        parts.append(f"{label(key)}: {n} file{'s' if n != 1 else ''} (e.g. {files[0].name})")
    return "; ".join(parts[:6]) + (f"; and {len(parts) - 6} more" if len(parts) > 6 else "")


def read_images(src, *, color=None, size=None, recursive=False, strict=False, bits=None,
                workers=None, progress=False, out=None, max_pixels=None, min_images=2):
    """Read same-size images into an :class:`ImageStack`.

    Parameters
    ----------
    src : str, Path, or list of them
        A folder, an image file, or a list of files and folders.
    color : {None, 'gray', 'rgb'}
        Colour policy (see the module notes). None: every file must agree.
    size : None, (width, height) or 'WxH'
        Resample every image to this size. None: every file must have the same size.
    recursive : bool
        Also look in sub-folders of folders.
    strict : bool
        Raise on the first unusable file instead of skipping it.
    bits : int, optional
        Significant bits per sample (1-16), e.g. 12 for 12-bit cameras writing 16-bit
        files. Default: the storage depth (8 or 16).
    workers : int, optional
        Decoding threads; default ``min(4, os.cpu_count())``.
    progress : bool or object
        Progress bar on stderr (see :mod:`imgreduce._progress`).
    out : str or Path, optional
        Write the pixel matrix to this ``.npy`` file as a memory map (for sets larger
        than memory) instead of holding it in memory. The file must not exist.
    max_pixels : int, optional
        Refuse files whose header claims more pixels (default 2**28).
    min_images : int
        Fewest usable images accepted (2: a basis needs two; screening a chunk takes 1).

    Returns
    -------
    ImageStack

    Raises
    ------
    InputError
        Missing paths, no usable images, fewer than two, mixed sizes, colour classes or
        bit depths (the message lists each group with a count and an example file).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from PIL import Image
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> for i in (1, 2, 10):
    ...     Image.fromarray(np.full((4, 6), 20 * i, np.uint8)).save(folder / f"f{i}.png")
    >>> stack = read_images(folder)
    >>> stack.pixels.shape, [pathlib.Path(p).name for p in stack.paths]
    ((3, 24), ['f1.png', 'f2.png', 'f10.png'])
    >>> bool(stack.pixels[2, 0] == np.float32(200 / 255))
    True
    """
    if color not in (None, "gray", "rgb"):
        raise ParameterError(f"color must be 'gray' or 'rgb' (or None to keep the files' own "
                             f"mode), got {color!r}")
    size = parse_size(size) if size is not None else None
    if bits is not None and (isinstance(bits, bool) or not 1 <= int(bits) <= 16):
        raise ParameterError(f"bits must be between 1 and 16, got {bits!r}")
    workers = min(4, os.cpu_count() or 1) if workers is None else int(workers)
    if workers < 1:
        raise ParameterError(f"workers must be at least 1, got {workers}")
    max_pixels = DEFAULT_MAX_PIXELS if max_pixels is None else int(max_pixels)
    if out is not None and Path(out).exists():
        raise InputError(f"{out} already exists; choose a new file for the memory map")

    files = _collect(src, recursive)
    with ThreadPoolExecutor(workers) as pool:
        probes = list(pool.map(lambda f: _probe(f, max_pixels), files))
    rejected = [Rejected(str(f), pr.reason) for f, pr in zip(files, probes) if pr.reason]
    if rejected and strict:
        raise InputError(f"{rejected[0].path}: {rejected[0].reason} (without --strict, "
                         "unusable files are skipped and listed)")
    good = [(f, pr) for f, pr in zip(files, probes) if not pr.reason]
    if not good:
        first = rejected[0]
        raise InputError(f"none of the {len(files)} file(s) could be used; "
                         f"{first.path}: {first.reason}")
    _check_uniform(good, color=color, size=size)

    kind = color or good[0][1].kind
    storage_bits = good[0][1].bits
    depth = int(bits) if bits is not None else storage_bits
    if bits is not None and depth > storage_bits:
        raise ParameterError(f"--bits {depth} exceeds the files' {storage_bits}-bit storage")
    scale = float(2 ** depth - 1)
    w, h = size if size is not None else good[0][1].size
    image_shape = (h, w) if kind == "gray" else (h, w, 3)
    p = int(np.prod(image_shape))
    pixels = _allocate((len(good), p), out)

    failures = {}
    bar = progress_bar(progress, total=len(good), desc="read", unit="img")

    def work(i):
        path, probe = good[i]
        try:
            arr = _decode(path, probe)
            expect = (probe.size[1], probe.size[0])
            if arr.shape[:2] != expect:
                raise OSError(f"decoded size {arr.shape[1]}x{arr.shape[0]} differs from "
                              f"its header {expect[1]}x{expect[0]}")
            img = _to_float(arr, probe, color=kind, scale=scale, bits=bits, size=size,
                            path=path)
            pixels[i] = img.reshape(-1)
        except InputError:
            raise
        except Exception as exc:  # truncated or damaged data shows only when decoding
            failures[i] = f"could not be decoded ({exc})"
        bar.update(1)

    try:
        with ThreadPoolExecutor(workers) as pool:
            for _ in pool.map(work, range(len(good))):
                pass
    finally:
        bar.close()

    if failures:
        if strict:
            i = min(failures)
            raise InputError(f"{good[i][0]}: {failures[i]} (without --strict, unusable "
                             "files are skipped and listed)")
        keep = [i for i in range(len(good)) if i not in failures]
        for dest, src_row in enumerate(keep):
            if dest != src_row:
                pixels[dest] = pixels[src_row]
        pixels = pixels[:len(keep)]
        rejected += [Rejected(str(good[i][0]), failures[i]) for i in sorted(failures)]
        good = [good[i] for i in keep]
    if len(good) < min_images:
        extra = f" ({len(rejected)} other file(s) skipped)" if rejected else ""
        need = ("a basis needs at least 2 images of the same setup" if min_images >= 2
                else "nothing to read")
        raise InputError(f"only {len(good)} usable image{extra}; {need}")
    rejected.sort(key=lambda r: _natural_key(r.path))
    return ImageStack(pixels=pixels, paths=[str(f) for f, _ in good],
                      image_shape=image_shape, bit_depth=depth, color=kind,
                      color_policy=color, size_policy=size, rejected=rejected)


def _allocate(shape, out):
    if out is not None:
        return np.lib.format.open_memmap(out, mode="w+", dtype=np.float32, shape=shape)
    try:
        return np.empty(shape, dtype=np.float32)
    except MemoryError:
        gib = shape[0] * shape[1] * 4 / 2 ** 30
        raise InputError(f"{shape[0]} images of {shape[1]} pixels need {gib:.1f} GiB, more "
                         "than is free; read them into a memory map (out=...) or resample "
                         "them smaller (--size)") from None


def _check_uniform(good, *, color, size):
    n = len(good)
    if size is None:
        groups = {}
        for f, pr in good:
            groups.setdefault(pr.size, []).append(f)
        if len(groups) > 1:
            common = max(groups, key=lambda k: len(groups[k]))
            raise InputError(
                "images differ in size — " + _describe_groups(
                    groups, lambda s: f"{s[0]}x{s[1]}", n)
                + f" (use --size {common[0]}x{common[1]} to resample them all, or remove "
                  "the odd files)")
    if color is None:
        groups = {}
        for f, pr in good:
            groups.setdefault(pr.kind, []).append(f)
        if len(groups) > 1:
            raise InputError("images mix gray and colour — " + _describe_groups(
                groups, str, n) + " (use --color gray or --color rgb to convert them all)")
    groups = {}
    for f, pr in good:
        groups.setdefault(pr.bits, []).append(f)
    if len(groups) > 1:
        raise InputError("images mix bit depths — " + _describe_groups(
            groups, lambda b: f"{b}-bit", n) + " (8- and 16-bit samples are different units; "
            "convert the files to one depth, or read each group separately)")
