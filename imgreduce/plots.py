"""Figures of a basis: mean image, basis-image montage, spectrum.

Every function builds a :class:`matplotlib.figure.Figure` with the object-oriented API (no
pyplot state, no window), returns it, and never shows it; :func:`save_figure` writes one
atomically. Signed images (basis images) use a diverging colour map centred on zero.
"""

import numpy as np

from ._files import atomic_path

__all__ = ["plot_mean_image", "plot_components", "plot_spectrum", "save_figure",
           "plot_rebuild_panel", "plot_quality_curves", "plot_rank_strip",
           "plot_control_chart", "residual_overlay"]

DIVERGING = "RdBu_r"


def _figure(width, height):
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def _as_image(row, image_shape):
    return np.asarray(row, dtype=np.float32).reshape(image_shape)


def _display_signed(img):
    """A signed basis image as one plane: RGB components are shown by their luma."""
    if img.ndim == 3:
        return img @ np.array([0.299, 0.587, 0.114], dtype=np.float32)
    return img


def plot_mean_image(basis, *, ax=None):
    """The mean training image, in pixel units [0, 1], with a colour bar.

    Examples
    --------
    >>> from imgreduce import fit_basis
    >>> b = fit_basis(np.random.default_rng(0).random((6, 12), dtype=np.float32), rank=2)
    >>> b.image_shape = (3, 4)
    >>> fig = plot_mean_image(b)
    >>> len(fig.axes)
    2
    """
    fig = ax.figure if ax is not None else _figure(5, 4.2)
    ax = ax if ax is not None else fig.add_subplot()
    img = _as_image(basis.mean, basis.image_shape)
    if img.ndim == 3:
        ax.imshow(np.clip(img, 0, 1))
    else:
        shown = ax.imshow(img, cmap="gray", vmin=0, vmax=1)
        fig.colorbar(shown, ax=ax, shrink=0.8, label="pixel value (0 = black, 1 = white)")
    ax.set_title(f"Mean image of {basis.n_samples} training images")
    ax.set_xticks([])
    ax.set_yticks([])
    return fig


def plot_components(basis, *, count=16, ncols=None):
    """Montage of the first `count` basis images, each on its own symmetric scale.

    Each panel is drawn with a diverging map from -m to +m, m its largest absolute value,
    so the sign pattern shows (the sign itself is a convention: see
    :mod:`imgreduce.basis`). Titles give the index and the share of variance.
    """
    count = max(1, min(int(count), basis.rank))
    ncols = ncols or int(np.ceil(np.sqrt(count)))
    nrows = int(np.ceil(count / ncols))
    h, w = basis.image_shape[:2]
    panel = 2.4
    fig = _figure(panel * ncols, panel * nrows * h / w + 0.6)
    ratios = basis.explained_variance_ratio
    for i in range(nrows * ncols):
        ax = fig.add_subplot(nrows, ncols, i + 1)
        ax.set_xticks([])
        ax.set_yticks([])
        if i >= count:
            ax.set_axis_off()
            continue
        img = _display_signed(_as_image(basis.components[i], basis.image_shape))
        m = float(np.abs(img).max()) or 1.0
        ax.imshow(img, cmap=DIVERGING, vmin=-m, vmax=m)
        ax.set_title(f"#{i + 1}  {100 * ratios[i]:.1f}%", fontsize=9)
    fig.suptitle(f"First {count} basis images (red +, blue -, each scaled to its own "
                 "largest value)", fontsize=10)
    return fig


def plot_spectrum(basis, *, ax=None):
    """Explained variance per component (log scale) and the cumulative share."""
    fig = ax.figure if ax is not None else _figure(7, 4.2)
    ax = ax if ax is not None else fig.add_subplot()
    ratios = np.asarray(basis.explained_variance_ratio, dtype=np.float64)
    k = np.arange(1, len(ratios) + 1)
    ax.semilogy(k, 100 * ratios, "o-", ms=3, color="tab:blue", label="per component")
    ax.set_xlabel("component")
    ax.set_ylabel("share of variance per component (%)", color="tab:blue")
    twin = ax.twinx()
    cumulative = 100 * np.cumsum(ratios)
    twin.plot(k, cumulative, color="tab:orange", lw=2, label="cumulative")
    twin.set_ylim(0, 100)
    twin.set_ylabel("cumulative share (%)", color="tab:orange")
    for level in (80, 90, 95):
        twin.axhline(level, color="0.6", lw=0.8, ls="--")
        reached = np.nonzero(cumulative >= level)[0]
        note = f"{level}%: k = {reached[0] + 1}" if len(reached) else f"{level}%: not reached"
        twin.text(len(ratios), level, note, ha="right", va="bottom", fontsize=8, color="0.35")
    ax.set_title(f"Spectrum: {len(ratios)} components explain {cumulative[-1]:.1f}% "
                 "of the variance")
    ax.grid(True, which="major", alpha=0.3)
    return fig


def save_figure(fig, path, *, dpi=120):
    """Write `fig` as PNG to `path` atomically (nothing under the name until it is whole)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=dpi, format="png")


def _display_image(img):
    img = np.clip(img, 0.0, 1.0)
    return dict(X=img) if img.ndim == 3 else dict(X=img, cmap="gray", vmin=0, vmax=1)


def plot_rebuild_panel(original, reconstructions, *, bit_depth=8, title=None):
    """Original, reconstructions at several ranks, and their signed error maps.

    Parameters
    ----------
    original : ndarray, shape (h, w) or (h, w, 3)
        Pixel units [0, 1].
    reconstructions : dict of int to ndarray
        Rank -> unclipped reconstruction, same shape. Displayed clipped.
    bit_depth : int
        The error colour bar is in the file's own grey levels (``2**bit_depth - 1`` = 1).
    title : str, optional

    Returns
    -------
    Figure
        Top row: original and reconstructions; bottom row: reconstruction - original on
        one diverging scale, symmetric about zero and shared across ranks.
    """
    ranks = sorted(reconstructions)
    levels = 2 ** bit_depth - 1
    errors = {r: _display_signed(np.asarray(reconstructions[r], np.float32) - original) * levels
              for r in ranks}
    m = max(float(np.abs(e).max()) for e in errors.values()) or 1.0
    h, w = original.shape[:2]
    cols = len(ranks) + 1
    fig = _figure(2.6 * cols + 0.8, 2 * 2.6 * h / w + 0.9)
    grid = fig.add_gridspec(2, cols)
    ax = fig.add_subplot(grid[0, 0])
    ax.imshow(**_display_image(original))
    ax.set_title("original", fontsize=9)
    for j, r in enumerate(ranks, start=1):
        ax = fig.add_subplot(grid[0, j])
        ax.imshow(**_display_image(np.asarray(reconstructions[r])))
        ax.set_title(f"rank {r}", fontsize=9)
    shown = None
    for j, r in enumerate(ranks, start=1):
        ax = fig.add_subplot(grid[1, j])
        shown = ax.imshow(errors[r], cmap=DIVERGING, vmin=-m, vmax=m)
        rms = float(np.sqrt(np.mean(errors[r] ** 2)))
        ax.set_title(f"error at rank {r} (RMS {rms:.2g})", fontsize=8)
    note = fig.add_subplot(grid[1, 0])
    note.set_axis_off()
    note.text(0.5, 0.5, "error = rebuilt - original\nin grey levels\n"
              f"(0 to {levels}); one scale\nfor all ranks", ha="center", va="center",
              fontsize=8, transform=note.transAxes)
    for ax in fig.axes:
        ax.set_xticks([])
        ax.set_yticks([])
    fig.colorbar(shown, ax=fig.axes[cols:], shrink=0.85, label="grey levels")
    if title:
        fig.suptitle(title, fontsize=10)
    return fig


def plot_quality_curves(choice, *, ax=None):
    """Held-out PSNR against rank (mean, 5th percentile, worst) with the choice marked.

    Parameters
    ----------
    choice : RankChoice
        From :func:`imgreduce.quality.choose_rank`.
    """
    fig = ax.figure if ax is not None else _figure(7.5, 4.5)
    ax = ax if ax is not None else fig.add_subplot()
    curve = choice.curve
    summary = curve.summary()
    ranks = curve.ranks[1:]
    ax.plot(ranks, summary["psnr_mean"][1:], color="tab:blue", lw=2, label="mean image")
    ax.plot(ranks, summary["psnr_p05"][1:], color="tab:orange", lw=2,
            label="5th percentile image")
    ax.plot(ranks, summary["psnr_min"][1:], color="tab:red", lw=1, ls=":", label="worst image")
    if choice.rule == "psnr":
        ax.axhline(choice.target, color="0.3", ls="--", lw=1,
                   label=f"target {choice.target:g} dB")
    ax.axvline(choice.rank, color="tab:green", lw=1.5,
               label=f"chosen rank {choice.rank} ({choice.rule})")
    markers = {"gavish_donoho": ("Gavish-Donoho", "v"), "broken_stick": ("broken stick", "^")}
    for key, (label, marker) in markers.items():
        r = choice.rules.get(key, {}).get("rank")
        if r and 1 <= r <= curve.max_rank:
            ax.plot([r], [summary["psnr_p05"][r]], marker, color="k", ms=7,
                    label=f"{label}: rank {r}")
    ax.set_xlabel("rank (components kept)")
    ax.set_ylabel("PSNR (dB)")
    where = "held-out images" if curve.held_out else "images scored by the given basis"
    ax.set_title(f"Reconstruction quality against rank, {where}")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    return fig


def plot_rank_strip(originals, reconstructions, labels, *, rank):
    """Pairs of original and reconstruction at `rank` (for example a typical and the worst).

    Parameters
    ----------
    originals, reconstructions : list of ndarray
        Images in pixel units (reconstructions unclipped; displayed clipped).
    labels : list of str
    rank : int
    """
    n = len(originals)
    h, w = originals[0].shape[:2]
    fig = _figure(2 * 2.6 + 0.4, n * 2.6 * h / w + 0.7)
    for i, (orig, rec, label) in enumerate(zip(originals, reconstructions, labels)):
        for j, (img, what) in enumerate(((orig, "original"), (rec, f"rank {rank}"))):
            ax = fig.add_subplot(n, 2, 2 * i + j + 1)
            ax.imshow(**_display_image(np.asarray(img)))
            ax.set_title(f"{label}: {what}", fontsize=8)
            ax.set_xticks([])
            ax.set_yticks([])
    fig.suptitle(f"Held-out images rebuilt at the chosen rank {rank}", fontsize=10)
    return fig


def plot_control_chart(q, t2, local, limits, *, flagged=None, title=None, note=None,
                       shift=None):
    """Q, T^2 and the local statistic in acquisition order, with their limits.

    Parameters
    ----------
    q, t2, local : array_like, shape (m,)
        Per-image statistics (`local` may be all NaN when not in use).
    limits : dict
        ``q_limit``, ``t2_limit``, ``local_limit`` (None when not in use).
    flagged : array_like of bool, optional
        Images drawn as red crosses.
    title : str, optional
    note : str, optional
        Small print under the chart (a caution, say).
    shift : array_like, optional
        Squared Mahalanobis distance of each frame's alignment shift, drawn against
        ``limits['shift_limit']`` (aligned screening).

    Examples
    --------
    >>> fig = plot_control_chart([1, 2, 9], [2, 3, 1], [1, 1, 1],
    ...                          {"q_limit": 5, "t2_limit": 4, "local_limit": 3},
    ...                          flagged=[False, False, True])
    >>> len(fig.axes)
    3
    """
    series = [("Q (squared residual)", np.asarray(q, float), limits.get("q_limit")),
              ("T$^2$ (inside the model)", np.asarray(t2, float), limits.get("t2_limit")),
              ("local (largest z of the residual map)", np.asarray(local, float),
               limits.get("local_limit"))]
    if shift is not None:
        series.append(("shift (placement distance$^2$)", np.asarray(shift, float),
                       limits.get("shift_limit")))
    series = [s for s in series if s[2] is not None and np.isfinite(s[1]).any()]
    n = len(series[0][1])
    flagged = np.zeros(n, bool) if flagged is None else np.asarray(flagged, bool)
    fig = _figure(10.5, 2.3 * len(series) + 0.8)
    axes = fig.subplots(len(series), 1, sharex=True, squeeze=False)[:, 0]
    x = np.arange(1, n + 1)
    small = n > 2000
    for ax, (label, values, limit) in zip(axes, series):
        positive = values[np.isfinite(values) & (values > 0)]
        log = len(positive) and positive.max() / max(positive.min(), 1e-300) > 50
        ax.plot(x, values, color="tab:blue", lw=0.6 if not small else 0.3, alpha=0.8)
        ax.plot(x[~flagged], values[~flagged], ".", color="tab:blue", ms=2 if small else 3)
        over = flagged & (values > limit)
        ax.plot(x[flagged & ~over], values[flagged & ~over], "x", color="0.45", ms=4,
                label="flagged by another statistic")
        ax.plot(x[over], values[over], "x", color="tab:red", ms=6, mew=1.5,
                label="over this limit")
        ax.axhline(limit, color="tab:red", ls="--", lw=1, label=f"limit {limit:.4g}")
        if log:
            ax.set_yscale("log")
        ax.set_ylabel(label, fontsize=8)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    axes[-1].set_xlabel("image, in acquisition (file name) order")
    if note:
        import textwrap

        fig.supxlabel(textwrap.fill(note, 150), fontsize=6.5, color="0.35")
    axes[0].set_title(title or f"Control chart: {int(flagged.sum())} of {n} images flagged")
    return fig


def residual_overlay(image, score_map, *, box=None, peak=None, limit=None, scale=None):
    """The frame in grey with the residual map over it, as an RGB uint8 array.

    Pixels of the map above 0.8 ``limit`` (or, without a limit, above a robust background
    level) are tinted from yellow to red by their score, the box drawn in cyan and the
    peak marked; elsewhere the frame shows through, so the defect is seen in place.
    Small frames are enlarged by an integer factor (`scale`, default: to about 512
    pixels wide) with nearest-neighbour pixels, so nothing is smoothed away.

    Parameters
    ----------
    image : ndarray, (h, w) or (h, w, 3), values in [0, 1]
    score_map : ndarray, (h, w)
    box : [row0, col0, row1, col1], optional (end exclusive)
    peak : [row, col], optional
    limit : float, optional
        The local statistic's limit, for the colour scale.

    Examples
    --------
    >>> img = np.full((8, 8), 0.5); m = np.zeros((8, 8)); m[2, 3] = 9.0
    >>> out = residual_overlay(img, m, box=[1, 2, 4, 5], peak=[2, 3], limit=4.0, scale=2)
    >>> out.shape, out.dtype.name
    ((16, 16, 3), 'uint8')
    """
    from matplotlib import colormaps

    img = np.asarray(image, dtype=np.float32)
    gray = img @ np.array([0.299, 0.587, 0.114], np.float32) if img.ndim == 3 else img
    base = np.repeat(np.clip(gray, 0, 1)[..., None], 3, axis=2)
    m = np.asarray(score_map, dtype=np.float32)
    if limit is None or not np.isfinite(limit):
        med = float(np.median(m))
        low = med + 6 * 1.4826 * float(np.median(np.abs(m - med)))
        high = max(float(m.max()), low * 1.01 + 1e-12)
    else:
        low, high = 0.8 * float(limit), max(float(m.max()), 1.5 * float(limit))
    weight = np.clip((m - low) / max(high - low, 1e-12), 0, 1)
    colour = colormaps["autumn_r"](weight)[..., :3].astype(np.float32)
    alpha = np.where(m > low, 0.35 + 0.5 * weight, 0.0)[..., None]
    out = base * (1 - alpha) + colour * alpha
    h, w = m.shape
    if scale is None:
        scale = max(1, min(8, 512 // max(w, 1)))
    out = np.repeat(np.repeat(out, scale, axis=0), scale, axis=1)
    rgb = (np.clip(out, 0, 1) * 255 + 0.5).astype(np.uint8)
    if box is not None:
        r0, c0, r1, c1 = (int(v) * scale for v in box)
        r1, c1 = min(r1, h * scale) - 1, min(c1, w * scale) - 1
        cyan = np.array([0, 230, 255], np.uint8)
        for t in range(max(1, scale // 2)):
            rgb[max(r0 - t, 0), c0:c1 + 1] = cyan
            rgb[min(r1 + t, h * scale - 1), c0:c1 + 1] = cyan
            rgb[r0:r1 + 1, max(c0 - t, 0)] = cyan
            rgb[r0:r1 + 1, min(c1 + t, w * scale - 1)] = cyan
    if peak is not None:
        pr, pc = (int(v) * scale + scale // 2 for v in peak)
        arm = max(3, 2 * scale)
        white = np.array([255, 255, 255], np.uint8)
        rgb[max(pr - arm, 0):pr + arm + 1, min(pc, w * scale - 1)] = white
        rgb[min(pr, h * scale - 1), max(pc - arm, 0):pc + arm + 1] = white
    return rgb
