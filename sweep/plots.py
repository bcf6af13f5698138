"""Figures of a result dataset: locus spread, limits, envelope, crossings, parameter plane.

The only module that imports matplotlib (inside the functions, Agg backend).
`plot` writes PNG, SVG or PDF chosen by the file extension; the ``*_figure``
functions return a matplotlib ``Figure`` for notebooks.
"""
from __future__ import annotations

import difflib
import math
import os
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import xarray as xr

from . import query
from .errors import InputError

KINDS = ("locus", "limits", "envelope", "crossings", "plane")
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}

# Okabe–Ito colours (safe for the common colour-vision deficiencies)
BLACK = "#000000"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#7f7f7f"
REFERENCE = "#404040"  # reference-gain lines: neutral, never a design colour
DESIGN_COLOURS = {"nominal": BLACK, "corners": ORANGE, "grid": GREEN, "random": SKY,
                  "lhs": BLUE, "sobol": PURPLE}

_STYLE = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "legend.fontsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#d9d9d9",
    "grid.linestyle": ":",
    "grid.linewidth": 0.7,
    "axes.edgecolor": "#4d4d4d",
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
}


class _Figures:
    """The two pyplot calls the figures use, without pyplot.

    Figures are plain ``matplotlib.figure.Figure`` objects: no backend is
    chosen or forced (a notebook keeps its own), nothing is registered in
    pyplot's figure manager, and ``savefig`` works headless.
    """

    @staticmethod
    def rc_context(rc):
        import matplotlib

        return matplotlib.rc_context(rc)

    @staticmethod
    def subplots(nrows: int = 1, ncols: int = 1, *, figsize, dpi, **kw):
        from matplotlib.figure import Figure

        fig = Figure(figsize=figsize, dpi=dpi)
        return fig, fig.subplots(nrows, ncols, **kw)


def _plt() -> type[_Figures]:
    return _Figures


# ------------------------------------------------------------------ helpers

def _units(ds: xr.Dataset, name: str) -> str:
    u = str(ds[name].attrs.get("units", "")) if name in ds.variables else ""
    return "" if u in ("", "1") else u


def _label(ds: xr.Dataset, name: str, text: str | None = None) -> str:
    u = _units(ds, name)
    t = text or name
    return f"{t} [{u}]" if u else t


def _scale(ds: xr.Dataset, name: str) -> tuple[float, str]:
    """Factor and axis label for a parameter, a power of ten moved into the label when needed."""
    x = np.asarray(ds[name].values, float)
    big = float(np.nanmax(np.abs(x))) if x.size else 0.0
    e = int(math.floor(math.log10(big))) if big > 0 and math.isfinite(big) else 0
    if -2 <= e <= 3:
        return 1.0, _label(ds, name)
    u = _units(ds, name)
    return 10.0**-e, (f"{name} [$10^{{{e}}}$ {u}]" if u else f"{name} [$10^{{{e}}}$]")


def _scaled(ds: xr.Dataset, name: str) -> tuple[np.ndarray, str]:
    """Values of a parameter and an axis label, with a power of ten moved into the label."""
    factor, label = _scale(ds, name)
    return np.asarray(ds[name].values, float) * factor, label


def _log_axis(axis, lo: float, hi: float) -> None:
    """A log scale with plain labels: decades only over wide spans, else 1-2-5 steps."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.axes.set_yscale("log") if axis.axis_name == "y" else axis.axes.set_xscale("log")
    decades = math.log10(hi / lo) if lo > 0 and hi > lo else 1.0
    subs = (1.0,) if decades > 4 else (1.0, 2.0, 5.0) if decades > 1.2 else (1.0, 1.5, 2.0, 3.0, 5.0, 7.0)
    axis.set_major_locator(LogLocator(base=10, subs=subs))
    axis.set_minor_formatter(NullFormatter())
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: _tick(v)))


def _tick(v: float) -> str:
    """Tick label: plain for ordinary sizes, engineering style (12k, 3M) for large ones."""
    if v == 0:
        return "0"
    a = abs(v)
    if a >= 1e4:
        for div, suffix in ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k")):
            if a >= div:
                return f"{v / div:g}{suffix}"
    return f"{v:g}"


def _linear_eng_formatter():
    """Tick labels of a linear axis in one engineering unit for all ticks (0, 5k, 10k, not 0, 5000, 10k)."""
    from matplotlib.ticker import Formatter

    class _Eng(Formatter):
        div, suffix = 1.0, ""

        def set_locs(self, locs):
            top = max((abs(v) for v in locs), default=0.0)
            self.div, self.suffix = 1.0, ""
            for div, suffix in ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k")):
                if top >= 10 * div:
                    self.div, self.suffix = div, suffix
                    break

        def __call__(self, v, pos=None):
            return "0" if v == 0 else f"{v / self.div:g}{self.suffix}"

    return _Eng()


def _renderer(fig):
    """A renderer to measure text and legends before the figure is drawn (any backend)."""
    from matplotlib.backends.backend_agg import RendererAgg

    return RendererAgg(int(fig.bbox.width) + 1, int(fig.bbox.height) + 1, fig.dpi)


def _wrap_to_width(fig, text, right: float = 0.99) -> None:
    """Break a figure text into lines so it ends left of ``right`` (figure fraction)."""
    import textwrap

    box = text.get_window_extent(_renderer(fig))
    room, wide = right * fig.bbox.width - box.x0, box.width
    if wide <= room or room <= 0:
        return
    s = text.get_text()
    chars = max(20, int(len(s) * room / wide) - 2)
    text.set_text(textwrap.fill(s, chars))


def _legend(fig, handles: list, *, ncol: int, **kw):
    """``fig.legend`` with at most ``ncol`` columns, fewer when a row would not fit the figure."""
    r = _renderer(fig)
    for n in range(max(int(ncol), 1), 0, -1):
        leg = fig.legend(handles=handles, ncol=n, **kw)
        box = leg.get_window_extent(r)
        if n == 1 or (box.x0 >= 0 and box.x1 <= fig.bbox.width):
            return leg
        leg.remove()
    return None


def _shorten_to_width(fig, text, right: float = 0.99) -> None:
    """Cut a one-line figure text with an ellipsis so it ends left of ``right`` (figure fraction)."""
    s = text.get_text()
    r = _renderer(fig)
    while len(s) > 10 and text.get_window_extent(r).x1 > right * fig.bbox.width:
        s = s[: int(len(s) * 0.95)].rstrip()
        text.set_text(s + "\u2026")


def _fit_xlabels(fig, axes) -> None:
    """Axis labels wider than their axes: units on a second line, then a smaller font."""
    r = _renderer(fig)
    for ax in axes:
        label = ax.xaxis.label
        room = ax.get_window_extent(r).width * 1.1  # a label may reach a little past its axes
        if label.get_window_extent(r).width <= room:
            continue
        t = label.get_text()
        if " [" in t:
            label.set_text(t.replace(" [", "\n[", 1))
        size = label.get_fontsize()
        while label.get_window_extent(r).width > room and size > 6:
            size -= 0.5
            label.set_fontsize(size)


def _title(fig, ds: xr.Dataset, subtitle: str) -> None:
    title = str(ds.attrs.get("title", "")).strip() or "sweep result"
    head = fig.suptitle(title, fontsize=11, fontweight="bold", x=0.01, ha="left")
    _shorten_to_width(fig, head)  # one line: the subtitle sits right below it
    sub = fig.text(0.01, 0.935, subtitle, fontsize=9, color="#404040", ha="left", va="top")
    _wrap_to_width(fig, sub)


def _design(ds: xr.Dataset) -> np.ndarray:
    return np.asarray(ds["design"].values).astype(str)


def _nominal_index(ds: xr.Dataset) -> int | None:
    idx = np.flatnonzero(_design(ds) == "nominal")
    return int(idx[0]) if idx.size else None


def _need(ds: xr.Dataset, names: Sequence[str], what: str, fix: str) -> None:
    missing = [n for n in names if n not in ds.variables]
    if missing:
        raise InputError(f"plot '{what}' needs {', '.join(missing)}, which the result lacks; {fix}",
                         field=missing[0])


def _fmt(x: float | None) -> str:
    """A number for labels: 4 significant digits, 33.88k rather than 3.388e+04."""
    if x is None or math.isnan(x):
        return "-"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    a = abs(x)
    for start, div, suffix in ((1e12, 1e12, "T"), (1e9, 1e9, "G"), (1e6, 1e6, "M"), (1e4, 1e3, "k")):
        if a >= start:
            return f"{x / div:.4g}{suffix}"
    return f"{x:.4g}"


# ------------------------------------------------------------------ locus

MAX_LOCUS_LINES = 1500  # more stored loci than this are thinned evenly (the spread stays visible)


def _keep_setting(ds: xr.Dataset) -> str:
    """``[locus] keep = "..."`` as the stored config gives it (for messages)."""
    try:
        locus = query.stored_config(ds).locus
        keep = f"random:{locus.keep_count}" if locus.keep == "random" else locus.keep
        return f'[locus] keep = "{keep}"'
    except Exception:  # noqa: BLE001 - only the wording of a message depends on it
        return "[locus] keep"


def _recomputed_loci(ds: xr.Dataset, indices: Sequence[int], gains: np.ndarray) -> dict[int, np.ndarray]:
    """Loci of a few variants whose loci the sweep did not keep, from the stored config.

    Returns ``{index: complex (G, n)}``; empty when the config cannot be
    rebuilt (the figure then says the locus is not stored).
    """
    text = ds.attrs.get("config")
    if not text or not indices:
        return {}
    try:
        from .locus import trace
        from .loop import assemble

        cfg = query.stored_config(ds)
        values = {p.name: np.asarray(ds[p.name].values[list(indices)], float) for p in cfg.parameters}
        N, D = assemble(cfg, values, count=len(indices))
        roots = trace(N, D, sigma=cfg.sigma, gains=gains)
    except Exception:  # noqa: BLE001 - a figure without these two loci is still a figure
        return {}
    if roots.shape[1] != gains.size:
        return {}
    return {int(i): roots[j] for j, i in enumerate(indices)}


def _locus_view(pz: np.ndarray, wc_f: np.ndarray, wcrit: np.ndarray, bp: np.ndarray,
                re: np.ndarray, must: np.ndarray) -> tuple[float, float, float]:
    """A window (x_lo, x_hi, y_half) around the crossings and the slow poles and zeros.

    ``must`` are points always inside (the closed-loop poles of the nominal
    and the worst case at the operating gain).
    """
    mags = np.abs(pz)
    nonzero = mags[mags > 0]
    candidates = []
    if wc_f.size:
        candidates.append(float(wc_f.max()))
    if nonzero.size:
        candidates.append(float(np.median(nonzero)))
    if bp.size:
        candidates.append(float(np.abs(bp).max()))
    # the crossings at the critical gains set the scale when there are any (that is where
    # stability is lost); the 90th percentile, so a few far crossings do not shrink the rest
    if wcrit.size:
        scale = float(np.percentile(wcrit, 90))
    elif wc_f.size:
        scale = float(np.percentile(wc_f, 90))
    else:
        scale = max(candidates) if candidates else 1.0
    if not candidates or scale <= 0:
        finite = np.abs(re[np.isfinite(re)])
        scale = float(np.median(finite)) if finite.size and np.median(finite) > 0 else 1.0
    reach = 4.0 * scale  # open-loop points beyond this are "outside the view"
    inside = np.concatenate([pz[np.abs(pz) <= reach], must[np.isfinite(must)]])
    xs = [0.0] + list(inside.real) + list(bp[np.abs(bp) <= reach])
    ys = [0.0] + list(np.abs(inside.imag)) + list(wc_f[wc_f <= 1.5 * scale])
    y_half = 1.25 * max(max(ys), 0.25 * scale, 1e-12)
    x_lo = min(xs) - 0.15 * (max(xs) - min(xs) + y_half)
    x_hi = max(max(xs), 0.0) + 0.35 * y_half
    # at least a square-ish window so the branches leaving for the asymptotes can be seen
    if x_hi - x_lo < y_half:
        x_lo = min(x_lo, -0.75 * y_half)
        x_hi = max(x_hi, 0.35 * y_half)
    return x_lo, x_hi, y_half


def locus_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Spread of the root-locus branches of the kept variants.

    Every kept variant's branches are thin translucent blue lines; the
    nominal's are bold black and the worst variant's (smallest critical gain,
    or furthest right at the reference gain) bold vermillion, recomputed from
    the stored config when the sweep did not keep them. Open-loop poles (x)
    and zeros (o) of the kept variants are marked, the nominal's and the
    worst's larger; the poles and zeros of all other variants form a faint
    grey cloud. Every variant's crossing of the imaginary axis (every
    boundary frequency) is a short orange tick on the axis, the nominal's and
    the worst's crossing at the critical gain a diamond. With an operating
    gain, the closed-loop poles of the nominal and the worst there are filled
    squares. The right half plane is shaded and labelled. The view is chosen
    around the crossings and the slow poles; poles and zeros far outside it
    are listed in a note.

    Parameters
    ----------
    ds
        A result dataset with ``locus_real``/``locus_imag``.
    dpi
        Figure resolution (dots per inch).

    Returns
    -------
    matplotlib.figure.Figure
    """
    _need(ds, ("locus_real", "locus_imag"), "locus",
          "the sweep stored no loci: set [locus] keep to \"corners\", \"all\" or \"random:N\" and rerun")
    if ds.sizes.get("locus_variant", 0) == 0:
        raise InputError(f"plot 'locus': no variant's locus is stored ({_keep_setting(ds)} selects none of this "
                         "result's variants); set keep to \"all\" or \"random:N\" (\"corners\" keeps the corners "
                         "and the nominal) and rerun 'sweep run'", field="locus.keep")
    plt = _plt()
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    re = np.asarray(ds["locus_real"].values, float)  # (LV, G, B)
    im = np.asarray(ds["locus_imag"].values, float)
    lv = np.asarray(ds["locus_variant"].values, int)
    gains = np.asarray(ds["gain"].values, float)
    variants = np.asarray(ds["variant"].values, int)
    row_of = {int(v): i for i, v in enumerate(variants)}
    nom = _nominal_index(ds)
    summary = query.summarize(ds)
    worst = None if summary["worst"] is None else row_of.get(int(summary["worst"]["variant"]))
    if worst == nom:
        worst = None  # one loop: drawn as the nominal
    k0 = query.operating_gain(ds)

    def pts(prefix: str) -> np.ndarray:
        if f"{prefix}_real" not in ds:
            return np.zeros((variants.size, 0), complex)
        return (np.asarray(ds[f"{prefix}_real"].values, float)
                + 1j * np.asarray(ds[f"{prefix}_imag"].values, float))

    poles, zeros = pts("open_loop_pole"), pts("open_loop_zero")
    kept_rows = np.array([row_of[int(v)] for v in lv if int(v) in row_of], int)
    # every crossing of the imaginary axis: all boundary frequencies when stored (this also
    # covers variants unstable at the reference gain, whose crossing_frequency is NaN)
    if "boundary_frequency" in ds:
        bf = np.asarray(ds["boundary_frequency"].values, float)
        wc = bf.ravel()
        n_crossing_variants = int(np.sum(np.any(np.isfinite(bf) & (bf >= 0), axis=1)))
    else:
        wc = np.asarray(ds["crossing_frequency"].values, float)
        n_crossing_variants = int(np.sum(np.isfinite(wc) & (wc >= 0)))
    wc_f = wc[np.isfinite(wc) & (wc > 0)]
    origin_crossings = int(np.sum(wc == 0))
    wcrit_all = np.asarray(ds["crossing_frequency"].values, float)
    wcrit = wcrit_all[np.isfinite(wcrit_all) & (wcrit_all > 0)]
    bp = np.asarray(ds["breakaway_point"].values, float) if "breakaway_point" in ds else np.zeros(0)
    bp = bp[np.isfinite(bp)]

    pz = np.concatenate([poles.ravel(), zeros.ravel()])
    pz = pz[np.isfinite(pz)]
    cl = pts("closed_loop_pole") if k0 is not None else np.zeros((variants.size, 0), complex)
    must = np.concatenate([cl[i] for i in (nom, worst) if i is not None] + [np.zeros(0, complex)])
    x_lo, x_hi, y_half = _locus_view(pz, wc_f, wcrit, bp, re, must)

    # the bold loci: stored, else recomputed from the config on the same gain grid
    bold: dict[int, np.ndarray] = {}
    for i in (nom, worst):
        if i is not None and variants[i] in lv:
            j = int(np.flatnonzero(lv == variants[i])[0])
            bold[i] = re[j] + 1j * im[j]
    missing = [i for i in (nom, worst) if i is not None and i not in bold]
    recomputed = _recomputed_loci(ds, missing, gains[gains > 0]) if missing else {}
    for i, r in recomputed.items():
        full = np.full((gains.size, r.shape[1]), np.nan + 0j)
        full[gains > 0] = r
        bold[i] = full
    not_shown = [i for i in missing if i not in recomputed]

    # the thin spread: every kept variant but the bold ones, thinned evenly when there are many
    thin = np.array([j for j, v in enumerate(lv) if row_of.get(int(v)) not in (nom, worst)], int)
    n_thin = thin.size
    if n_thin > MAX_LOCUS_LINES:
        thin = thin[np.linspace(0, n_thin - 1, MAX_LOCUS_LINES).round().astype(int)]

    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(9.4, 5.8), dpi=dpi or 100)
        fig.subplots_adjust(left=0.085, right=0.615, top=0.86, bottom=0.1)
        ax.axvspan(0, 1e300, color=VERMILLION, alpha=0.10, lw=0, zorder=0)
        ax.axhline(0, color="#8c8c8c", lw=0.8, zorder=1)
        ax.axvline(0, color="#595959", lw=1.0, zorder=1)
        many = variants.size > 2000

        # all variants' open-loop poles and zeros, as a faint cloud under everything
        others = np.setdiff1d(np.arange(variants.size), kept_rows)
        if others.size:
            cp, cz = poles[others].ravel(), zeros[others].ravel()
            cp, cz = cp[np.isfinite(cp)], cz[np.isfinite(cz)]
            a = float(np.clip(30.0 / max(others.size, 1), 0.04, 0.5))
            ax.scatter(cp.real, cp.imag, s=4, marker="x", lw=0.5, color=GREY, alpha=a, zorder=1.5,
                       rasterized=many)
            if cz.size:
                ax.scatter(cz.real, cz.imag, s=4, marker="o", facecolor="none", lw=0.5, color=GREY,
                           alpha=a, zorder=1.5, rasterized=many)

        alpha = float(np.clip(8.0 / max(thin.size, 1), 0.05, 0.6))
        segs = [np.column_stack([re[j, :, b], im[j, :, b]]) for j in thin for b in range(re.shape[2])]
        if segs:
            ax.add_collection(LineCollection(segs, colors=BLUE, linewidths=0.7, alpha=alpha, zorder=2,
                                             rasterized=len(segs) > 600))
        if kept_rows.size:
            kp, kz = poles[kept_rows].ravel(), zeros[kept_rows].ravel()
            a = float(np.clip(40.0 / kept_rows.size, 0.05, 1.0))  # many kept: a cloud, not a blot
            ax.plot(kp.real, kp.imag, "x", color="#595959", ms=4, mew=0.8, alpha=a, zorder=3,
                    rasterized=kp.size > 3000)
            ax.plot(kz.real, kz.imag, "o", mfc="none", mec="#595959", ms=4, mew=0.8, alpha=a, zorder=3,
                    rasterized=kz.size > 3000)

        for i, colour, lw, z in ((worst, VERMILLION, 1.8, 4), (nom, BLACK, 2.0, 5)):
            if i is None:
                continue
            if i in bold:
                r = bold[i]
                for b in range(r.shape[1]):
                    ax.plot(r[:, b].real, r[:, b].imag, color=colour, lw=lw, zorder=z,
                            solid_capstyle="round")
            ms = 9 if colour == BLACK else 8
            ax.plot(poles[i].real, poles[i].imag, "x", color=colour, ms=ms, mew=2, zorder=z + 2)
            if zeros.shape[1]:
                ax.plot(zeros[i].real, zeros[i].imag, "o", mfc="white", mec=colour, ms=ms - 1, mew=2,
                        zorder=z + 2)

        # axis crossings: a short tick per crossing, translucent so their density shows
        if wc_f.size:
            a = float(np.clip(30.0 / wc_f.size, 0.03, 1.0))
            ax.scatter(np.zeros(2 * wc_f.size), np.concatenate([wc_f, -wc_f]), marker="_", s=60,
                       lw=1.4, color=ORANGE, alpha=a, zorder=7, rasterized=wc_f.size > 3000)
        if origin_crossings:  # a real root through s = 0
            ax.plot([0], [0], "|", ms=14, mew=2.0, color=ORANGE, zorder=7)
        # nominal first, the worst on top and a little smaller, so both stay visible when close
        drew_diamond = drew_cl = False
        for i, colour, ms, z in ((nom, BLACK, 8, 9), (worst, VERMILLION, 6.5, 10)):
            if i is not None and np.isfinite(wcrit_all[i]) and wcrit_all[i] > 0:
                w = wcrit_all[i]
                ax.plot([0, 0], [w, -w], "D", ms=ms, mfc=colour, mec="white", mew=0.8, zorder=z)
                drew_diamond = True
        for i, colour, ms, z in ((nom, BLACK, 7.5, 11), (worst, VERMILLION, 5.5, 12)):
            if i is not None and cl.shape[1] and np.isfinite(cl[i]).any():
                ax.plot(cl[i].real, cl[i].imag, "s", ms=ms, mfc=colour, mec="white", mew=0.8,
                        zorder=z)
                drew_cl = True

        # equal scales on both axes by widening the shorter side to the box's shape,
        # unless that would squash the view by more than 3x (then scales differ)
        bbox = ax.get_position()
        box = (bbox.width * fig.get_figwidth()) / (bbox.height * fig.get_figheight())
        want = 2 * y_half * box
        have = x_hi - x_lo
        if have < want and want / have <= 3:
            x_lo -= 0.75 * (want - have)
            x_hi += 0.25 * (want - have)
        elif have > want and have / want <= 3:
            y_half = have / (2 * box)
        # a pole or zero just at or beyond an edge is pulled inside rather than cut in half
        span = x_hi - x_lo
        near = pz[(pz.real > x_lo - 0.12 * span) & (pz.real < x_lo + 0.03 * span)
                  & (np.abs(pz.imag) <= y_half)]
        if near.size:
            x_lo = float(near.real.min()) - 0.05 * span
        near = pz[(pz.real < x_hi + 0.12 * span) & (pz.real > x_hi - 0.03 * span)
                  & (np.abs(pz.imag) <= y_half)]
        if near.size:
            x_hi = float(near.real.max()) + 0.05 * span
        near = np.abs(pz.imag[(pz.real >= x_lo) & (pz.real <= x_hi)])
        near = near[(near > 0.97 * y_half) & (near < 1.12 * y_half)]
        if near.size:
            y_half = float(near.max()) + 0.05 * y_half
        ax.set_xlim(x_lo, x_hi)
        ax.set_ylim(-y_half, y_half)

        # open-loop points outside the view: say where they are
        notes = []
        inside = lambda z: (z.real >= x_lo) & (z.real <= x_hi) & (np.abs(z.imag) <= y_half)  # noqa: E731
        for label, arr in (("poles", poles.ravel()), ("zeros", zeros.ravel())):
            arr = arr[np.isfinite(arr)]
            far = arr[~inside(arr)]
            if far.size:
                lo_, hi_ = far.real.min(), far.real.max()
                span = _fmt(lo_) if np.isclose(lo_, hi_, rtol=0.05) else f"{_fmt(lo_)} .. {_fmt(hi_)}"
                notes.append(f"open-loop {label} outside the view: real part {span}")
        n_high = int(np.sum(wc_f > y_half))
        if n_high:
            notes.append(f"{n_high} axis crossing(s) beyond the view (|w| up to "
                         f"{_fmt(float(wc_f.max()))} rad/s)")
        if origin_crossings:
            notes.append(f"{origin_crossings} crossing(s) through s = 0 (a real root)")
        if n_thin > thin.size:
            notes.append(f"thin lines: {thin.size} of {n_thin} stored loci, evenly chosen")
        for i, who in ((nom, "nominal"), (worst, "worst case")):
            if i is not None and i in recomputed:
                notes.append(f"{who} locus recomputed from the stored config (not kept by the sweep)")
        for i in not_shown:
            notes.append(f"{'nominal' if i == nom else 'worst case'} locus not stored")

        if max(abs(x_lo), abs(x_hi), y_half) >= 1e4:  # 400k reads better than 4e5 with an offset
            from matplotlib.ticker import EngFormatter

            ax.xaxis.set_major_formatter(EngFormatter(sep=""))
            ax.yaxis.set_major_formatter(EngFormatter(sep=""))
        ax.set_xlabel(f"real part [{_units(ds, 'locus_real') or '1/s'}]")
        ax.set_ylabel(f"imaginary part [{_units(ds, 'locus_imag') or 'rad/s'}]")
        if notes:
            ax.text(0.01, 0.02, "\n".join(notes), transform=ax.transAxes, ha="left", va="bottom",
                    fontsize=7.5, color="#404040", zorder=20,
                    bbox=dict(boxstyle="round,pad=0.3", fc="white", ec="#bfbfbf", alpha=0.92))

        handles = []
        if nom is not None:
            handles.append(Line2D([], [], color=BLACK, lw=2.0, marker="x", mew=2, ms=8,
                                  label=f"nominal (variant {int(variants[nom])})"))
        if worst is not None:
            wlabel = f"worst case (variant {int(variants[worst])}"
            wk = summary["worst"]["critical_gain"]
            if wk is not None and math.isfinite(wk):
                wlabel += f", critical gain {_fmt(wk)})"
            elif summary["unstable_at_reference"]:
                wlabel += ", unstable at the reference gain)"
            else:
                wlabel += ")"
            handles.append(Line2D([], [], color=VERMILLION, lw=1.8, marker="x", mew=2, ms=7, label=wlabel))
        if thin.size:
            handles.append(Line2D([], [], color=BLUE, lw=1.2, alpha=0.6,
                                  label=f"branches of {n_thin} other stored variants"))
        if kept_rows.size:
            handles.append(Line2D([], [], marker="x", ls="none", color="#595959", ms=5,
                                  label="their open-loop poles (x)" + (" and zeros (o)" if zeros.shape[1] else "")))
        if others.size:
            handles.append(Line2D([], [], marker="x", ls="none", color=GREY, alpha=0.6, ms=4,
                                  label=f"poles/zeros of the other {others.size} variants"))
        if wc_f.size or origin_crossings:
            handles.append(Line2D([], [], marker="_", ls="none", color=ORANGE, ms=12, mew=1.6,
                                  label=f"imaginary-axis crossings ({n_crossing_variants} variants"
                                        + (", | at s = 0)" if origin_crossings else ")")))
        if drew_diamond:
            handles.append(Line2D([], [], marker="D", ls="none", mfc=GREY, mec="white", ms=7,
                                  label="crossing at the critical gain (nominal, worst)"))
        if drew_cl:
            handles.append(Line2D([], [], marker="s", ls="none", mfc=GREY, mec="white", ms=7,
                                  label=f"closed-loop poles at the operating gain {_fmt(k0)}"))
        handles.append(Patch(fc=VERMILLION, alpha=0.2, label="right half plane: unstable"))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False,
                  borderaxespad=0.0, handlelength=2.2)
        g = gains[gains > 0]
        _title(fig, ds, f"Root-locus spread: {lv.size} stored loci of {variants.size} variants, "
                        f"gain {_fmt(float(g.min()))} to {_fmt(float(g.max()))} "
                        f"({ds.attrs.get('feedback', 'negative')} feedback)")
    return fig


# ------------------------------------------------------------------ limits

MAX_POINTS_PER_DESIGN = 20000  # scatter panels thin larger designs evenly (the note says so)


def _crit_for_plot(ds: xr.Dataset):
    crit = np.asarray(ds["critical_gain"].values, float)
    if "stable_at_reference" in ds:
        unstable = np.asarray(ds["stable_at_reference"].values) == 0
    else:
        unstable = np.isnan(crit)
    return crit, unstable


def _panel_grid(n: int) -> tuple[int, int]:
    """Rows and columns of small multiples: 2x2 for four, at most three across."""
    cols = 2 if n == 4 else min(n, 3)
    return math.ceil(n / cols), cols


def limits_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Critical gain against each uncertain parameter, one small panel per parameter.

    Points are coloured by design (sampled designs translucent, corners and
    grid points on top); the worst case (ring) and the nominal (diamond) are
    marked; the reference gain is a dashed line, always inside the view;
    infinite critical gains are triangles on the top edge and variants
    unstable at the reference gain crosses on the bottom edge, both counted
    in the legend. Designs with more than ``MAX_POINTS_PER_DESIGN`` variants
    are thinned evenly for drawing.

    Parameters
    ----------
    ds
        A result dataset.
    dpi
        Figure resolution.

    Returns
    -------
    matplotlib.figure.Figure
    """
    _need(ds, ("critical_gain", "design"), "limits", "rerun 'sweep run'")
    plt = _plt()
    from matplotlib.lines import Line2D

    names = query.uncertain_names(ds) or query.parameter_names(ds)
    if not names:
        raise InputError("plot 'limits': the sweep has no parameters to plot the critical gain "
                         "against; use --what envelope, crossings or locus", field="parameters")
    crit, unstable = _crit_for_plot(ds)
    design = _design(ds)
    variants = np.asarray(ds["variant"].values)
    summary = query.summarize(ds)
    worst = summary["worst"]["variant"] if summary["worst"] else None
    wi = int(np.flatnonzero(variants == worst)[0]) if worst is not None else None
    nom = _nominal_index(ds)
    k_ref = summary["reference_gain"]
    finite = crit[np.isfinite(crit)]
    if finite.size:
        lo, hi = float(finite.min()), float(finite.max())
    else:  # nothing finite to draw: centre the (otherwise empty) scale on the reference gain
        lo, hi = (0.5 * k_ref, 2.0 * k_ref) if k_ref > 0 else (0.0, 1.0)
    use_log = finite.size > 1 and lo > 0 and hi / lo > 20
    # the reference gain belongs in the view (the margin is the distance to it), unless on a
    # log scale it lies decades below the data
    ref_in_view = k_ref > 0 and (not use_log or k_ref >= lo / 100)
    if ref_in_view:
        lo, hi = min(lo, k_ref), max(hi, k_ref)
    if use_log:
        y_bot, y_top = lo / 1.6, hi * 1.6
    else:
        if ref_in_view and lo > 0:
            lo = 0.0  # a linear axis from 0 shows the margin to the reference gain in proportion
        pad = 0.1 * (hi - lo) if hi > lo else 0.5 * abs(hi) + 1
        y_bot, y_top = (lo - 0.5 * pad if lo == 0 else lo - pad), hi + pad
    # infinite critical gains sit in a band just above each panel, labelled "inf" (never a number)
    y_inf = y_top * (y_top / y_bot) ** 0.05 if use_log else y_top + 0.05 * (y_top - y_bot)
    n = len(names)
    rows, cols = _panel_grid(n)
    present = [d for d in DESIGN_COLOURS if d in set(design)] + sorted(set(design) - set(DESIGN_COLOURS))
    # big sets first so the small ones (corners, grid) stay visible on top
    order = sorted((d for d in present if d != "nominal"), key=lambda d: -int((design == d).sum()))
    shown = np.ones(design.size, bool)
    thinned = []
    for d in order:
        idx = np.flatnonzero(design == d)
        if idx.size > MAX_POINTS_PER_DESIGN:
            keep = idx[np.linspace(0, idx.size - 1, MAX_POINTS_PER_DESIGN).round().astype(int)]
            shown[np.setdiff1d(idx, keep)] = False
            thinned.append(f"{d}: {MAX_POINTS_PER_DESIGN} of {idx.size} drawn")
    with plt.rc_context(_STYLE):
        width = 3.3 * cols + 0.8
        height = 2.9 * rows + 1.5
        fig, axes = plt.subplots(rows, cols, figsize=(width, height), dpi=dpi or 100, sharey=True,
                                 squeeze=False)
        fig.subplots_adjust(left=0.8 / width, right=1 - 0.15 / width, top=1 - 1.0 / height,
                            bottom=1.35 / height, wspace=0.08, hspace=0.5)
        for k, name in enumerate(names):
            ax = axes[k // cols][k % cols]
            x, xlabel = _scaled(ds, name)
            for d in order:
                m = (design == d) & shown
                c = DESIGN_COLOURS.get(d, GREY)
                count = int(m.sum())
                sampled = d in query.SAMPLED_DESIGNS
                alpha = float(np.clip(400.0 / max(count, 1), 0.15, 0.8)) if sampled else 0.9
                f = m & np.isfinite(crit)
                dense = count > 1000  # rasterised inside SVG/PDF so vector files stay small
                ax.scatter(x[f], crit[f], s=10 if sampled else 16, color=c, alpha=alpha, lw=0,
                           zorder=3 if sampled else 4, rasterized=dense)
                inf_m = m & np.isposinf(crit)
                ax.scatter(x[inf_m], np.full(inf_m.sum(), y_inf), marker="^", s=22, color=c,
                           alpha=max(alpha, 0.5), lw=0, clip_on=False, zorder=4, rasterized=dense)
                u = m & unstable
                ax.scatter(x[u], np.full(u.sum(), y_bot), marker="x", s=20, color=c, lw=1,
                           alpha=max(alpha, 0.5), clip_on=False, zorder=4, rasterized=dense)
            if ref_in_view:
                ax.axhline(k_ref, color=REFERENCE, lw=1.2, ls="--", zorder=2)
            if nom is not None:
                yn = crit[nom] if np.isfinite(crit[nom]) else (y_bot if unstable[nom] else y_inf)
                ax.scatter([x[nom]], [yn], marker="D", s=46, color=BLACK, edgecolor="white", lw=0.6,
                           zorder=5, clip_on=False)
            if wi is not None:
                yw = crit[wi] if np.isfinite(crit[wi]) else (y_bot if unstable[wi] else y_inf)
                ax.scatter([x[wi]], [yw], s=150, facecolor="none", edgecolor=VERMILLION, lw=2,
                           zorder=6, clip_on=False)
            if np.isposinf(crit).any() and k % cols == 0:
                ax.text(-0.02, y_inf, "inf", transform=ax.get_yaxis_transform(), ha="right",
                        va="center", fontsize=8, color="#404040")
            ax.set_xlabel(xlabel)
            if use_log:
                _log_axis(ax.yaxis, y_bot, y_top)
            ax.set_ylim(y_bot, y_top)
            if k % cols == 0:
                ax.set_ylabel("critical gain")
        for k in range(n, rows * cols):
            axes[k // cols][k % cols].set_visible(False)
        _fit_xlabels(fig, [axes[k // cols][k % cols] for k in range(n)])
        handles = [Line2D([], [], marker="o", ls="none", color=DESIGN_COLOURS.get(d, GREY), ms=5,
                          label=f"{d} ({int((design == d).sum())})") for d in present if d != "nominal"]
        if nom is not None:
            handles.append(Line2D([], [], marker="D", ls="none", color=BLACK, ms=6, label="nominal"))
        if wi is not None:
            wk = summary["worst"]["critical_gain"]
            if wk is not None and math.isfinite(wk):
                wl = f"worst case, variant {worst} ({_fmt(wk)})"
            elif summary["unstable_at_reference"]:
                wl = f"worst case, variant {worst} (unstable at the reference gain)"
            else:  # every critical gain infinite: any variant is as good as the worst
                wl = f"worst case, variant {worst} (inf, as every variant)"
            handles.append(Line2D([], [], marker="o", ls="none", mfc="none", mec=VERMILLION, mew=2,
                                  ms=11, label=wl))
        if ref_in_view:
            handles.append(Line2D([], [], color=REFERENCE, ls="--", label=f"reference gain {_fmt(k_ref)}"))
        elif k_ref > 0:
            handles.append(Line2D([], [], ls="none", label=f"reference gain {_fmt(k_ref)} (far below the view)"))
        if np.isposinf(crit).any():
            handles.append(Line2D([], [], marker="^", ls="none", color=GREY,
                                  label=f"inf: never unstable in the range, drawn above "
                                        f"({int(np.isposinf(crit).sum())})"))
        if unstable.any():
            handles.append(Line2D([], [], marker="x", ls="none", color=GREY,
                                  label=f"unstable at the reference gain, drawn at the bottom "
                                        f"({int(unstable.sum())})"))
        _legend(fig, handles, ncol=min(len(handles), 3 if cols < 3 else 4), loc="lower center",
                frameon=False, bbox_to_anchor=(0.5, 0.0))
        sub = ("Critical gain against each uncertain parameter" if query.uncertain_names(ds)
               else "Critical gain against each parameter (none varies)")
        sub += " (log scale)" if use_log else ""
        if not finite.size:
            sub += "; no finite critical gain: " + (
                "every variant is unstable at the reference gain" if unstable.all()
                else "no variant loses stability in the gain range" if np.isposinf(crit).all()
                else "each variant is unstable at the reference gain or never loses stability")
        if summary["not_computed"]:
            sub += f"; {summary['not_computed']} variants without a computed critical gain not drawn"
        if thinned:
            sub += "; " + ", ".join(thinned)
        _title(fig, ds, sub)
    return fig


# ------------------------------------------------------------------ envelope

def envelope_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Spectral-abscissa band (min..max over all variants) and mean against gain.

    Log gain axis, the zero line (stability boundary), the robust gain
    interval shaded and the operating gain marked.

    Parameters
    ----------
    ds
        A result dataset with ``abscissa_min/max/mean``.
    dpi
        Figure resolution.

    Returns
    -------
    matplotlib.figure.Figure
    """
    _need(ds, ("abscissa_min", "abscissa_max", "abscissa_mean"), "envelope", "rerun 'sweep run'")
    plt = _plt()
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    g = np.asarray(ds["gain"].values, float)
    amin = np.asarray(ds["abscissa_min"].values, float)
    amax = np.asarray(ds["abscissa_max"].values, float)
    amean = np.asarray(ds["abscissa_mean"].values, float)
    pos = g > 0
    g, amin, amax, amean = g[pos], amin[pos], amax[pos], amean[pos]
    summary = query.summarize(ds)
    k0 = query.operating_gain(ds)
    rgi = summary["robust_gain_interval"]
    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(7.6, 5.2), dpi=dpi or 100)
        fig.subplots_adjust(left=0.13, right=0.97, top=0.86, bottom=0.27)
        handles = []
        if rgi is not None:
            lo = max(rgi[0], g.min()) if g.size else rgi[0]
            hi = min(rgi[1], g.max()) if g.size else rgi[1]
            ax.axvspan(lo, hi, color=GREEN, alpha=0.13, lw=0, zorder=0)
            handles.append(Patch(fc=GREEN, alpha=0.3,
                                 label=f"robust gain interval ({_fmt(rgi[0])}, {_fmt(rgi[1])})"))
        else:
            handles.append(Patch(fc="none", ec="none", label="no robust gain interval"))
        ax.fill_between(g, amin, amax, color=SKY, alpha=0.45, lw=0, zorder=2)
        ax.plot(g, amax, color=BLUE, lw=0.8, zorder=3)
        ax.plot(g, amin, color=BLUE, lw=0.8, zorder=3)
        ax.plot(g, amean, color=BLACK, lw=1.6, zorder=4)
        ax.axhline(0, color=VERMILLION, lw=1.2, ls="--", zorder=3)
        handles[:0] = [Patch(fc=SKY, alpha=0.6, label="min .. max over all variants"),
                       Line2D([], [], color=BLACK, lw=1.6, label="mean"),
                       Line2D([], [], color=VERMILLION, ls="--", label="zero: stability boundary")]
        if k0 is not None:
            ax.axvline(k0, color=ORANGE, lw=1.6, zorder=5)
            handles.append(Line2D([], [], color=ORANGE, lw=1.6, label=f"operating gain {_fmt(k0)}"))
        w = summary["worst"]
        if w is not None and w["critical_gain"] is not None and math.isfinite(w["critical_gain"]) \
                and g.size and g.min() <= w["critical_gain"] <= g.max():
            ax.plot([w["critical_gain"]], [0.0], "D", ms=7, mfc=VERMILLION, mec="white", zorder=6)
            handles.append(Line2D([], [], marker="D", ls="none", mfc=VERMILLION, mec="white", ms=7,
                                  label=f"worst critical gain {_fmt(w['critical_gain'])} "
                                        f"(variant {w['variant']})"))
        if g.size:
            _log_axis(ax.xaxis, float(g.min()), float(g.max()))
            ax.set_xlim(g.min(), g.max())
        else:
            ax.set_xscale("log")
        lo_y = float(np.nanmin(amin)) if amin.size else -1.0
        hi_y = float(np.nanmax(amax)) if amax.size else 1.0
        # the abscissa often spans decades on one side of zero while the crossing happens
        # near zero: a symmetric log scale (linear near zero) keeps both readable
        mag = np.abs(np.concatenate([amin, amax]))
        mag = mag[np.isfinite(mag) & (mag > 0)]
        linthresh = float(np.percentile(mag, 20)) if mag.size else 1.0
        symlog = mag.size and mag.max() / linthresh > 30
        ylabel = "spectral abscissa [1/s]\n(largest real part of a root)"
        if symlog:
            ax.set_yscale("symlog", linthresh=linthresh, linscale=1.0)
            y0, y1 = -3.0 * max(-lo_y, linthresh), 3.0 * max(hi_y, linthresh)  # ~half a decade of room
            ax.set_ylim(y0, y1)
            e0 = math.ceil(math.log10(linthresh))
            ticks = [0.0]
            for e in range(e0, 300):
                t = 10.0**e
                if t > max(-y0, y1):
                    break
                ticks += [t] if t <= y1 else []
                ticks += [-t] if -t >= y0 else []
            ax.set_yticks(sorted(ticks))
            # one formatter for every tick, so -10 and -10k carry the same minus sign
            ax.set_yticklabels([_tick(t) for t in sorted(ticks)])
            ax.text(1.0, -0.09, f"y: symmetric log scale, linear within ±{linthresh:.2g}",
                    transform=ax.transAxes, ha="right", va="top", fontsize=7, color="#595959")
        else:
            span = hi_y - lo_y if hi_y > lo_y else 1.0
            ax.set_ylim(lo_y - 0.05 * span, hi_y + 0.05 * span)
        ax.set_xlabel(_label(ds, "gain", "loop gain k"))
        ax.set_ylabel(ylabel)
        _legend(fig, handles, ncol=2, loc="lower center", frameon=False, bbox_to_anchor=(0.5, 0.0))
        _title(fig, ds, f"Spectral abscissa against gain over all {summary['n_variants']} variants "
                        "(above zero: some variant unstable)")
    return fig


# ------------------------------------------------------------------ crossings

def crossings_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Distributions of the critical gain and of the crossing frequency.

    Histograms of the sampled designs (random, lhs, sobol; the same variants
    as the quantiles of ``sweep query``), or of every variant when there is no
    sampled design; the corners and grid points as a rug of short ticks under
    the bars; the worst case, the nominal and the reference gain as vertical
    lines whose values are in the legend. A log axis is used when the values
    span more than a factor of 20. Infinite critical gains, crossings through
    the origin and variants unstable at the reference gain have no bar and
    are counted in the note under the panels.

    Parameters
    ----------
    ds
        A result dataset.
    dpi
        Figure resolution.

    Returns
    -------
    matplotlib.figure.Figure
    """
    _need(ds, ("critical_gain", "crossing_frequency"), "crossings", "rerun 'sweep run'")
    plt = _plt()
    from matplotlib.ticker import MaxNLocator
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    crit, unstable = _crit_for_plot(ds)
    freq = np.asarray(ds["crossing_frequency"].values, float)
    design = _design(ds)
    summary = query.summarize(ds)
    basis, qb = query.quantile_basis(ds)
    sampled_basis = bool(set(qb["designs"]) & set(query.SAMPLED_DESIGNS))
    rug = np.isin(design, query.LEVEL_DESIGNS) & ~basis
    w = summary["worst"]
    nom = summary["nominal"]
    k_ref = summary["reference_gain"]
    with plt.rc_context(_STYLE):
        fig, axes = plt.subplots(1, 2, figsize=(9.0, 4.6), dpi=dpi or 100)
        fig.subplots_adjust(left=0.075, right=0.98, top=0.83, bottom=0.33, wspace=0.2)
        for ax, data, label, wv, nv, ref in (
            (axes[0], crit, "critical gain", w["critical_gain"] if w else None,
             nom["critical_gain"] if nom else None, k_ref if k_ref > 0 else None),
            (axes[1], freq, _label(ds, "crossing_frequency", "crossing frequency"),
             w["crossing_frequency"] if w else None, nom["crossing_frequency"] if nom else None, None),
        ):
            ok = np.isfinite(data) & (data > 0)
            f = data[basis & ok]
            every = data[ok]
            marks = [v for v in (wv, nv) if v is not None and math.isfinite(v) and v > 0]
            if every.size or marks:
                span = np.concatenate([every, marks])
            else:  # nothing to count: say so in the panel
                span = np.array([0.5 * ref, 2.0 * ref]) if ref else np.array([0.5, 2.0])
                ax.text(0.5, 0.75, "no finite positive values\n(see the note below)",
                        transform=ax.transAxes, ha="center", va="center", fontsize=9, color="#595959",
                        bbox=dict(fc="white", ec="none", pad=2))
                ax.set_yticks([])
                if not ref:
                    ax.set_xticks([])
            lo, hi = float(span.min()), float(span.max())
            log = lo > 0 and hi / lo > 20  # judged on the data, not on the reference gain
            if ref is not None and (not log or ref >= lo / 100):
                lo = min(lo, ref)  # the margin to the reference gain is part of the picture
            elif ref is not None:
                ref = None  # decades below the data: named in the legend instead
            if f.size:
                if f.min() == f.max():
                    bins = np.array([f.min() * 0.98, f.max() * 1.02]) if f.min() else 10
                elif log:
                    bins = np.geomspace(f.min(), f.max() * 1.0001, 31)
                else:
                    bins = np.linspace(f.min(), f.max() + 1e-12 * max(1, abs(f.max())), 31)
                ax.hist(f, bins=bins, color=SKY, edgecolor=BLUE, lw=0.5, zorder=2)
            ax.set_ylim(bottom=0)
            ax.margins(y=0.12)
            for d in query.LEVEL_DESIGNS:  # structured designs: a rug of ticks at the foot
                r = data[rug & ok & (design == d)]
                if r.size:
                    ax.plot(r, np.zeros(r.size), "|", ms=9, mew=1.1, color=DESIGN_COLOURS[d],
                            transform=ax.get_xaxis_transform(), clip_on=False, zorder=3, alpha=0.8)
            if log:
                _log_axis(ax.xaxis, lo, hi)
                ax.set_xlim(lo / 1.15, hi * 1.15)
            else:
                pad = 0.04 * (hi - lo or abs(hi) or 1.0)
                ax.set_xlim(lo - pad, hi + pad)
                if hi >= 1e4:
                    ax.xaxis.set_major_formatter(_linear_eng_formatter())
            for val, colour, ls, lw in ((ref, REFERENCE, ":", 1.6), (nv, BLACK, "--", 1.6),
                                        (wv, VERMILLION, "-", 2.0)):
                if val is not None and math.isfinite(val) and val > 0:
                    ax.axvline(val, color=colour, lw=lw, ls=ls, zorder=4)
            ax.set_xlabel(label + (" (log scale)" if log else ""))
            ax.set_ylabel("variants" + (f" ({', '.join(qb['designs'])})" if sampled_basis else ""))
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))  # counts: no 0.2 of a variant
        handles = []
        if w and w["critical_gain"] is not None and math.isfinite(w["critical_gain"]):
            handles.append(Line2D([], [], color=VERMILLION, lw=2.0,
                                  label=f"worst case, variant {w['variant']}: critical gain "
                                        f"{_fmt(w['critical_gain'])}, crossing "
                                        f"{_fmt(w['crossing_frequency'])} rad/s"))
        if nom and nom["critical_gain"] is not None and math.isfinite(nom["critical_gain"]):
            handles.append(Line2D([], [], color=BLACK, lw=1.6, ls="--",
                                  label=f"nominal: critical gain {_fmt(nom['critical_gain'])}, "
                                        f"crossing {_fmt(nom['crossing_frequency'])} rad/s"))
        if k_ref > 0:
            handles.append(Line2D([], [], color=REFERENCE, lw=1.6, ls=":",
                                  label=f"reference gain {_fmt(k_ref)}"))
        bar_label = (f"{', '.join(qb['designs'])} variants ({qb['variants']})" if sampled_basis
                     else f"every variant ({qb['variants']}; design points, not a probability)")
        handles.append(Patch(fc=SKY, ec=BLUE, label=bar_label))
        drawn = rug & ((np.isfinite(crit) & (crit > 0)) | (np.isfinite(freq) & (freq > 0)))
        for d in query.LEVEL_DESIGNS:
            cnt = int((drawn & (design == d)).sum())
            if cnt:
                handles.append(Line2D([], [], marker="|", ls="none", color=DESIGN_COLOURS[d], ms=9,
                                      mew=1.1, label=f"{d} ({cnt}), one tick each"))
        _legend(fig, handles, ncol=1 if len(handles) < 4 else 2, loc="upper left", frameon=False,
                bbox_to_anchor=(0.065, 0.17), fontsize=7.5)
        n_inf = int(np.isposinf(crit).sum())
        n_un = int(unstable.sum())
        n_zero = int(np.sum(freq == 0))
        msg = [f"{int(np.isfinite(crit).sum())} of {crit.size} variants have a finite critical gain"]
        if n_inf:
            msg.append(f"{n_inf} never lose stability in the gain range (inf, no bar)")
        if n_un:
            msg.append(f"{n_un} are unstable at the reference gain (no bar)")
            if w:
                msg.append(f"worst case: variant {w['variant']} ({w['design']}), unstable at the "
                           "reference gain")
        if n_zero:
            msg.append(f"{n_zero} lose stability through s = 0 (crossing frequency 0, no bar)")
        if summary["not_computed"]:
            msg.append(f"{summary['not_computed']} have no computed critical gain (ill-conditioned, "
                       "no bar)")
        fig.text(0.01, 0.012, "; ".join(msg), fontsize=7.5, color="#404040", ha="left", va="bottom",
                 wrap=True)
        _title(fig, ds, "Where stability is lost: critical gains and crossing frequencies")
    return fig


# ------------------------------------------------------------------ plane

def plane_figure(ds: xr.Dataset, params: Sequence[str] | None, *, dpi: float | None = None):
    """Smallest critical gain over the other parameters, on a grid of two parameters.

    Uses the variants of the ``grid`` design only.

    Parameters
    ----------
    ds
        A result dataset whose designs include ``grid``.
    params
        The two parameters ``(A, B)``: A across, B up.
    dpi
        Figure resolution.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError
        No grid design, parameters missing or not varied by the grid.
    """
    table = plane_table(ds, params)
    b, a = table.dims
    plt = _plt()
    from matplotlib.colors import LogNorm, Normalize
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    val = table.values
    # axis values with a power of ten moved into the label, as in the limits plot
    fa, la_label = _scale(ds, a)
    fb, lb_label = _scale(ds, b)
    xa, xb = table[a].values * fa, table[b].values * fb
    finite = val[np.isfinite(val)]
    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(6.6, 5.2), dpi=dpi or 100)
        fig.subplots_adjust(left=0.12, right=0.88, top=0.84, bottom=0.2)

        def edges(c):
            if c.size == 1:
                return np.array([c[0] - 0.5 * abs(c[0] or 1), c[0] + 0.5 * abs(c[0] or 1)])
            mid = 0.5 * (c[1:] + c[:-1])
            return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])

        if finite.size and finite.min() > 0 and finite.max() / finite.min() > 20:
            norm = LogNorm(finite.min(), finite.max())
        elif finite.size:
            lo_v, hi_v = float(finite.min()), float(finite.max())
            mid = 0.5 * (lo_v + hi_v)
            # a tiny spread must not look like a big one: at least +-5 % of the value
            half = max(0.5 * (hi_v - lo_v), 0.05 * abs(mid), 1e-12)
            norm = Normalize(mid - half, mid + half)
        else:
            norm = Normalize(0, 1)
        import matplotlib

        cmap = matplotlib.colormaps["cividis"].copy()
        masked = np.ma.masked_invalid(val)
        mesh = ax.pcolormesh(edges(xa), edges(xb), masked, cmap=cmap, norm=norm, shading="flat",
                             edgecolors="white", linewidth=0.6)
        # cells with no finite value: inf (never unstable) or unstable at the reference gain
        extra = []
        for (j, i), v in np.ndenumerate(val):
            if np.isposinf(v):
                ax.add_patch(_cell(edges(xa), edges(xb), i, j, fc="white", hatch="///", ec=GREEN))
            elif np.isnan(v):
                ax.add_patch(_cell(edges(xa), edges(xb), i, j, fc="#f3c9b1", hatch="xx", ec=VERMILLION))
        if np.isposinf(val).any():
            extra.append(Patch(fc="white", ec=GREEN, hatch="///",
                               label="inf: every variant here stays stable in the gain range"))
        if np.isnan(val).any():
            extra.append(Patch(fc="#f3c9b1", ec=VERMILLION, hatch="xx",
                               label="a variant here is unstable at the reference gain"))
        if val.size <= 49:
            for (j, i), v in np.ndenumerate(val):
                if np.isfinite(v):
                    rgba = cmap(norm(v))
                    light = 0.299 * rgba[0] + 0.587 * rgba[1] + 0.114 * rgba[2] > 0.55
                    ax.text(xa[i], xb[j], _fmt(float(v)), ha="center", va="center", fontsize=7.5,
                            color=BLACK if light else "white", zorder=6,
                            bbox=dict(boxstyle="square,pad=0.15", fc=rgba, ec="none"))
        if finite.size:
            jw, iw = np.unravel_index(np.nanargmin(np.where(np.isfinite(val), val, np.nan)), val.shape)
            ax.plot(xa[iw], xb[jw], "s", ms=22, mfc="none", mec=VERMILLION, mew=2.2)
            extra.append(Line2D([], [], marker="s", ls="none", mfc="none", mec=VERMILLION, mew=2,
                                    ms=10, label=("smallest critical gain of the stable cells"
                                                  if np.isnan(val).any()
                                                  else "worst cell (smallest critical gain)")))
        nom = _nominal_index(ds)
        if nom is not None:
            # cross-hair lines, so the cell's number stays readable
            from matplotlib import patheffects

            halo = [patheffects.withStroke(linewidth=3.2, foreground=BLACK)]
            ax.axvline(float(ds[a].values[nom]) * fa, color=ORANGE, lw=1.6, ls=(0, (4, 2)),
                       path_effects=halo)
            ax.axhline(float(ds[b].values[nom]) * fb, color=ORANGE, lw=1.6, ls=(0, (4, 2)),
                       path_effects=halo)
            extra.append(Line2D([], [], color=ORANGE, lw=1.6, ls=(0, (4, 2)),
                                    path_effects=halo, label="nominal values"))
        cb = fig.colorbar(mesh, ax=ax, fraction=0.05, pad=0.03)
        cb.set_label("smallest critical gain over the other parameters")
        from matplotlib.ticker import FuncFormatter, NullFormatter

        if isinstance(norm, LogNorm):
            from matplotlib.ticker import LogLocator

            cb.ax.yaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        cb.ax.yaxis.set_minor_formatter(NullFormatter())
        cb.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_xlabel(la_label)
        ax.set_ylabel(lb_label)
        ax.set_xticks(xa)
        ax.set_yticks(xb)
        ax.set_xticklabels([f"{v:.4g}" for v in xa])
        ax.set_yticklabels([f"{v:.4g}" for v in xb])
        ax.tick_params(axis="x", labelrotation=30 if xa.size > 5 else 0)
        ax.grid(False)
        if extra:
            _legend(fig, extra, ncol=min(len(extra), 2), loc="lower center", frameon=False,
                    bbox_to_anchor=(0.5, 0.0))
        others = table.attrs["others"]
        sub = (f"Critical gain over {a} and {b} ({table.attrs['n_variants']} grid variants, "
               + (f"minimum over {others})" if others else "no other uncertain parameter)"))
        if table.attrs["not_computed"]:
            sub += f"; {table.attrs['not_computed']} variants without a computed value left out"
        _title(fig, ds, sub)
    return fig


def _cell(ex, ey, i, j, **kw):
    from matplotlib.patches import Rectangle

    return Rectangle((ex[i], ey[j]), ex[i + 1] - ex[i], ey[j + 1] - ey[j], lw=0.6, **kw)


def plane_table(ds: xr.Dataset, params: Sequence[str] | None) -> xr.DataArray:
    """The numbers behind the plane plot, for notebooks too.

    Parameters
    ----------
    ds
        A result dataset.
    params
        Two parameter names ``(A, B)``; None picks the two uncertain
        parameters when there are exactly two.

    Returns
    -------
    xarray.DataArray
        ``critical_gain_min`` with dims ``(B, A)`` whose coordinates are the
        sorted grid levels: at each level pair the smallest critical gain over
        the grid variants there (``inf`` when all are ``inf``, NaN when any is
        unstable at the reference gain; variants without a computed critical
        gain are left out). Attributes: ``others`` (the remaining uncertain
        parameters, comma separated), ``n_variants`` (grid variants used) and
        ``not_computed`` (grid variants left out).

    Raises
    ------
    InputError
        When the dataset has no grid design or the parameters are not in it.
    """
    design = _design(ds)
    present = sorted(set(design))
    uncertain = query.uncertain_names(ds)
    # first what the result itself rules out, then what the caller chose
    if len(uncertain) < 2:
        raise InputError("plot 'plane' needs two parameters that vary between the variants; this "
                         f"result has {len(uncertain) or 'none'}"
                         + (f" ({', '.join(uncertain)})" if uncertain else "")
                         + "; add \"grid\" to [sweep] designs with two or more toleranced "
                         "parameters, or use --what "
                         + ("limits or crossings" if uncertain else "envelope, crossings or locus"),
                         field="--params")
    if "grid" not in present:
        raise InputError("plot 'plane' uses the grid design, which this result lacks (designs: "
                         f"{', '.join(present)}); add \"grid\" to [sweep] designs (levels = 5 or so) "
                         "and rerun 'sweep run'", field="sweep.designs")
    if params is None and len(uncertain) == 2:
        params = tuple(uncertain)  # the only two there are
    if params is None or len(params) != 2:
        raise InputError("plot 'plane' needs exactly two parameters, e.g. --params "
                         f"{' '.join(uncertain[:2])} (uncertain parameters: {', '.join(uncertain)})",
                         field="--params")
    a, b = (str(p) for p in params)
    if a == b:
        raise InputError(f"plot 'plane': the two parameters must differ (got {a} twice)",
                         field="--params")
    known = query.parameter_names(ds)
    for p in (a, b):
        if p not in known:
            close = difflib.get_close_matches(p, known, n=1, cutoff=0.5)
            hint = f"; did you mean '{close[0]}'?" if close else f"; parameters: {', '.join(known)}"
            raise InputError(f"plot 'plane': no parameter '{p}' in the result{hint}", field="--params")
    m = design == "grid"
    crit, unstable = _crit_for_plot(ds)
    xa = np.asarray(ds[a].values, float)[m]
    xb = np.asarray(ds[b].values, float)[m]
    for p, x in ((a, xa), (b, xb)):
        if np.ptp(x) == 0:
            raise InputError(f"plot 'plane': parameter '{p}' does not vary over the grid design "
                             f"(it is fixed); choose among {', '.join(uncertain)}", field="--params")
    la, ia = np.unique(xa, return_inverse=True)
    lb, ib = np.unique(xb, return_inverse=True)
    y = crit[m]
    uns = unstable[m]
    missing = ~uns & np.isnan(y)  # stable but not computed: left out of the minimum
    val = np.full((lb.size, la.size), np.inf)
    np.minimum.at(val, (ib, ia), np.where(uns | missing, np.inf, y))
    bad = np.zeros_like(val, bool)
    np.logical_or.at(bad, (ib, ia), uns)
    val[bad] = np.nan
    others = [n for n in uncertain if n not in (a, b)]
    out = xr.DataArray(val, dims=(b, a), coords={b: lb, a: la}, name="critical_gain_min")
    for name in (a, b):
        out[name].attrs.update(ds[name].attrs)
    out.attrs.update(long_name="smallest critical gain over the other parameters", units="1",
                     others=", ".join(others), n_variants=int(m.sum()),
                     not_computed=int(missing.sum()))
    return out


# ------------------------------------------------------------------ front

def figure(ds: xr.Dataset, what: str, *, params: Sequence[str] | None = None,
           dpi: float | None = None):
    """The figure of one kind, for notebooks.

    Parameters
    ----------
    ds
        A result dataset.
    what
        One of ``locus``, ``limits``, ``envelope``, ``crossings``, ``plane``.
    params
        The two parameters of ``plane``.
    dpi
        Figure resolution.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if what not in KINDS:
        close = difflib.get_close_matches(str(what), KINDS, n=1)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        raise InputError(f"unknown plot '{what}'{hint} (choose from {', '.join(KINDS)})",
                         field="what")
    if what == "plane":
        return plane_figure(ds, params, dpi=dpi)
    return {"locus": locus_figure, "limits": limits_figure, "envelope": envelope_figure,
            "crossings": crossings_figure}[what](ds, dpi=dpi)


def plot(ds: xr.Dataset, what: str, out: str | Path, *, params: Sequence[str] | None = None,
         dpi: float | None = None) -> Path:
    """Draw one kind of figure and write it; the format follows the file extension.

    Parameters
    ----------
    ds
        A result dataset (DESIGN section 4).
    what
        ``locus``, ``limits``, ``envelope``, ``crossings`` or ``plane``.
    out
        Output file ending in ``.png``, ``.svg`` or ``.pdf``.
    params
        The two parameters ``(A, B)`` of ``plane``.
    dpi
        Resolution (PNG); default 150.

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    InputError
        Unknown kind or extension, or data the kind needs are missing.
    """
    out = Path(out)
    fmt = FORMATS.get(out.suffix.lower())
    if fmt is None:
        raise InputError(f"cannot write '{out.suffix or 'no extension'}': end the file name in "
                         ".png, .svg or .pdf", file=str(out), field="-o")
    fig = figure(ds, what, params=params, dpi=dpi)
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        meta = {"Creator": "sweep"} if fmt in ("pdf", "svg") else None
        # write beside the target and rename: a failed save never leaves half an image
        fig.savefig(tmp, format=fmt, dpi=dpi or 150, metadata=meta)
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out
