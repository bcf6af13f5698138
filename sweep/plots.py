"""Figures of a result dataset: locus spread, limits, envelope, crossings, parameter plane.

The only module that imports matplotlib (inside the functions, Agg backend).
`plot` writes PNG, SVG or PDF chosen by the file extension; the ``*_figure``
functions return a matplotlib ``Figure`` for notebooks.
"""
from __future__ import annotations

import difflib
import math
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


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


# ------------------------------------------------------------------ helpers

def _units(ds: xr.Dataset, name: str) -> str:
    u = str(ds[name].attrs.get("units", "")) if name in ds.variables else ""
    return "" if u in ("", "1") else u


def _label(ds: xr.Dataset, name: str, text: str | None = None) -> str:
    u = _units(ds, name)
    t = text or name
    return f"{t} [{u}]" if u else t


def _scaled(ds: xr.Dataset, name: str) -> tuple[np.ndarray, str]:
    """Values of a parameter and an axis label, with a power of ten moved into the label."""
    x = np.asarray(ds[name].values, float)
    big = float(np.nanmax(np.abs(x))) if x.size else 0.0
    e = int(math.floor(math.log10(big))) if big > 0 and math.isfinite(big) else 0
    if -2 <= e <= 3:
        return x, _label(ds, name)
    u = _units(ds, name)
    return x / 10.0**e, f"{name} [$10^{{{e}}}$ {u}]" if u else f"{name} [$10^{{{e}}}$]"


def _title(fig, ds: xr.Dataset, subtitle: str) -> None:
    title = str(ds.attrs.get("title", "")).strip() or "sweep result"
    fig.suptitle(title, fontsize=11, fontweight="bold", x=0.01, ha="left")
    fig.text(0.01, 0.935, subtitle, fontsize=9, color="#404040", ha="left", va="top")


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


def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if math.isinf(x):
        return "inf"
    return f"{x:.4g}"


# ------------------------------------------------------------------ locus

def locus_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Spread of the root-locus branches of the kept variants.

    Every kept variant's branches are thin translucent lines, the nominal's
    bold; open-loop poles (x) and zeros (o) of every variant are marked (the
    nominal's larger), every variant's crossing of the imaginary axis at
    ``±j crossing_frequency`` is a diamond, and the right half plane is shaded.
    The view is chosen around the crossings and the slow poles; poles and
    zeros far outside it are listed at the edge of the plot.

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
        raise InputError("plot 'locus': no variant's locus is stored ([locus] keep = \"none\"); set "
                         "keep to \"corners\", \"all\" or \"random:N\" and rerun 'sweep run'",
                         field="locus.keep")
    plt = _plt()
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    re = np.asarray(ds["locus_real"].values, float)  # (LV, G, B)
    im = np.asarray(ds["locus_imag"].values, float)
    lv = np.asarray(ds["locus_variant"].values, int)
    variants = np.asarray(ds["variant"].values, int)
    nom = _nominal_index(ds)
    nom_variant = None if nom is None else int(variants[nom])

    def pts(prefix: str) -> np.ndarray:
        if f"{prefix}_real" not in ds:
            return np.zeros((0,), complex)
        r = np.asarray(ds[f"{prefix}_real"].values, float)
        i = np.asarray(ds[f"{prefix}_imag"].values, float)
        return r + 1j * i

    poles, zeros = pts("open_loop_pole"), pts("open_loop_zero")
    # every crossing of the imaginary axis: all boundary frequencies when stored (this also
    # covers variants unstable at the reference gain, whose crossing_frequency is NaN)
    if "boundary_frequency" in ds:
        wc = np.asarray(ds["boundary_frequency"].values, float).ravel()
        crossing_what = "imaginary-axis crossings"
    elif "crossing_frequency" in ds:
        wc = np.asarray(ds["crossing_frequency"].values, float)
        crossing_what = "axis crossings at the critical gain"
    else:
        wc, crossing_what = np.array([]), ""
    wc_f = wc[np.isfinite(wc) & (wc > 0)]
    origin_crossings = int(np.sum(wc == 0))
    n_crossing_variants = int(np.sum(np.any(np.isfinite(np.asarray(
        ds["boundary_frequency"].values, float)) & (np.asarray(ds["boundary_frequency"].values,
                                                                float) > 0), axis=1))) \
        if "boundary_frequency" in ds else int(wc_f.size)

    # --- the view: around the crossings and the slow open-loop poles/zeros
    pz = np.concatenate([poles.ravel(), zeros.ravel()]) if poles.size or zeros.size else np.zeros(0, complex)
    pz = pz[np.isfinite(pz)]
    mags = np.abs(pz)
    nonzero = mags[mags > 0]
    scale_candidates = []
    if wc_f.size:
        scale_candidates.append(float(wc_f.max()))
    if nonzero.size:
        scale_candidates.append(float(np.median(nonzero)))
    if "breakaway_point" in ds:
        bp = np.asarray(ds["breakaway_point"].values, float)
        bp = bp[np.isfinite(bp)]
    else:
        bp = np.zeros(0)
    if bp.size:
        scale_candidates.append(float(np.abs(bp).max()))
    # the crossings set the scale when there are any: they are where stability is lost
    # the crossings at the critical gains set the scale when there are any (that is where
    # stability is lost); the 90th percentile, so a few far crossings do not shrink the rest
    wcrit = (np.asarray(ds["crossing_frequency"].values, float) if "crossing_frequency" in ds
             else np.array([]))
    wcrit = wcrit[np.isfinite(wcrit) & (wcrit > 0)]
    if wcrit.size:
        scale = float(np.percentile(wcrit, 90))
    elif wc_f.size:
        scale = float(np.percentile(wc_f, 90))
    else:
        scale = max(scale_candidates) if scale_candidates else 1.0
    if not scale_candidates or scale <= 0:
        finite = np.abs(re[np.isfinite(re)])
        scale = float(np.median(finite)) if finite.size else 1.0
    reach = 4.0 * scale  # open-loop points beyond this are "outside the view"
    inside = pz[np.abs(pz) <= reach]
    xs = [0.0] + list(inside.real) + list(bp[np.abs(bp) <= reach])
    ys = [0.0] + list(np.abs(inside.imag)) + list(wc_f[wc_f <= 1.5 * scale])
    y_half = 1.25 * max(max(ys), 0.25 * scale, 1e-12)
    x_lo = min(xs) - 0.15 * (max(xs) - min(xs) + y_half)
    x_hi = max(max(xs), 0.0) + 0.35 * y_half
    # at least a square-ish window so the branches leaving for the asymptotes can be seen
    if x_hi - x_lo < y_half:
        x_lo = min(x_lo, -0.75 * y_half)
        x_hi = max(x_hi, 0.35 * y_half)

    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(9.0, 5.6), dpi=dpi or 100)
        fig.subplots_adjust(left=0.08, right=0.64, top=0.86, bottom=0.1)
        ax.axvspan(0, 1e300, color=VERMILLION, alpha=0.07, lw=0, zorder=0)
        ax.axhline(0, color="#8c8c8c", lw=0.8, zorder=1)
        ax.axvline(0, color="#8c8c8c", lw=0.8, zorder=1)

        others = lv != nom_variant
        n_lines = int(others.sum())
        alpha = float(np.clip(6.0 / max(n_lines, 1), 0.06, 0.5))
        segs = []
        for b in range(re.shape[2]):
            for j in np.flatnonzero(others):
                segs.append(np.column_stack([re[j, :, b], im[j, :, b]]))
        if segs:
            ax.add_collection(LineCollection(segs, colors=BLUE, linewidths=0.7, alpha=alpha, zorder=2))
        has_nom_locus = nom_variant is not None and np.any(lv == nom_variant)
        if has_nom_locus:
            j = int(np.flatnonzero(lv == nom_variant)[0])
            for b in range(re.shape[2]):
                ax.plot(re[j, :, b], im[j, :, b], color=BLACK, lw=2.0, zorder=4)

        if poles.size:
            ax.plot(poles.real.ravel(), poles.imag.ravel(), "x", color=GREY, ms=4, mew=0.8, zorder=5)
        if zeros.size:
            ax.plot(zeros.real.ravel(), zeros.imag.ravel(), "o", mfc="none", mec=GREY, ms=4,
                    mew=0.8, zorder=5)
        if nom is not None and poles.size:
            ax.plot(poles[nom].real, poles[nom].imag, "x", color=BLACK, ms=9, mew=2, zorder=6)
        if nom is not None and zeros.size:
            ax.plot(zeros[nom].real, zeros[nom].imag, "o", mfc="white", mec=BLACK, ms=8, mew=2,
                    zorder=6)
        if wc_f.size:
            ax.plot(np.zeros(2 * wc_f.size), np.concatenate([wc_f, -wc_f]), "D", ms=4,
                    mfc=VERMILLION, mec="white", mew=0.4, zorder=7)

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
        ax.set_xlim(x_lo, x_hi)
        ax.set_ylim(-y_half, y_half)
        # open-loop points outside the view: say where they are
        far = pz[(pz.real < x_lo) | (pz.real > x_hi) | (np.abs(pz.imag) > y_half)]
        notes = []
        if far.size:
            fp = far[np.isin(far, poles.ravel())]
            fz = far[np.isin(far, zeros.ravel())]
            for label, arr in (("poles", fp), ("zeros", fz)):
                if arr.size:
                    lo_, hi_ = arr.real.min(), arr.real.max()
                    span = f"{_fmt(lo_)}" if np.isclose(lo_, hi_, rtol=0.05) else f"{_fmt(lo_)} .. {_fmt(hi_)}"
                    notes.append(f"{label} outside the view: real part {span}")
        n_high = int(np.sum(wc_f > y_half))
        if n_high:
            notes.append(f"{n_high} axis crossing(s) beyond the view (|w| up to {_fmt(float(wc_f.max()))} rad/s)")
        if origin_crossings:
            notes.append(f"{origin_crossings} variant(s) lose stability through s = 0")

        if max(abs(x_lo), abs(x_hi), y_half) >= 1e4:  # 400k reads better than 4e5 with an offset
            from matplotlib.ticker import EngFormatter

            ax.xaxis.set_major_formatter(EngFormatter(sep=""))
            ax.yaxis.set_major_formatter(EngFormatter(sep=""))
        ax.set_xlabel("real part [1/s]")
        ax.set_ylabel("imaginary part [rad/s]")
        if notes:
            ax.text(0.01, 0.02, "\n".join(notes), transform=ax.transAxes, ha="left", va="bottom",
                    fontsize=7.5, color="#404040",
                    bbox=dict(boxstyle="round,pad=0.3", fc="white", ec="#bfbfbf", alpha=0.9))

        handles = [
            Line2D([], [], color=BLUE, lw=1.2, alpha=0.6, label=f"branches of {n_lines} variants"),
            Line2D([], [], marker="x", ls="none", color=GREY, label="open-loop poles (each variant)"),
            Line2D([], [], marker="D", ls="none", mfc=VERMILLION, mec="white",
                   label=f"{crossing_what} ({n_crossing_variants} variants)"),
            Patch(fc=VERMILLION, alpha=0.15, label="right half plane (unstable)"),
        ]
        has_zeros = bool(np.isfinite(zeros).any()) if zeros.size else False
        if has_zeros:
            handles.insert(2, Line2D([], [], marker="o", ls="none", mfc="none", mec=GREY,
                                     label="open-loop zeros (each variant)"))
        if has_nom_locus:
            handles.insert(1, Line2D([], [], color=BLACK, lw=2.0, label="nominal branches"))
        if nom is not None and poles.size:
            handles.insert(3, Line2D([], [], marker="x", ls="none", color=BLACK, ms=8, mew=2,
                                     label="nominal open-loop poles"))
        if nom is not None and has_zeros:
            handles.insert(len(handles) - 2, Line2D([], [], marker="o", ls="none", mfc="white", mec=BLACK, ms=7,
                                     mew=2, label="nominal open-loop zeros"))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False,
                  borderaxespad=0.0)
        _title(fig, ds, f"Root-locus spread: {re.shape[0]} stored loci, gain "
                        f"{_fmt(float(ds['gain'].values.min()))} to {_fmt(float(ds['gain'].values.max()))}")
    return fig


# ------------------------------------------------------------------ limits

def _crit_for_plot(ds: xr.Dataset):
    crit = np.asarray(ds["critical_gain"].values, float)
    if "stable_at_reference" in ds:
        unstable = np.asarray(ds["stable_at_reference"].values) == 0
    else:
        unstable = np.isnan(crit)
    return crit, unstable


def limits_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Critical gain against each uncertain parameter, one small panel per parameter.

    Points are coloured by design; the worst case (ring) and the nominal
    (diamond) are marked; infinite critical gains are drawn as triangles on
    the top edge and variants unstable at the reference gain as crosses on
    the bottom edge.

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
        raise InputError("plot 'limits': the result has no parameter coordinates; rerun 'sweep run'",
                         field="parameters")
    crit, unstable = _crit_for_plot(ds)
    design = _design(ds)
    summary = query.summarize(ds)
    worst = summary["worst"]["variant"] if summary["worst"] else None
    wi = int(np.flatnonzero(np.asarray(ds["variant"].values) == worst)[0]) if worst is not None else None
    nom = _nominal_index(ds)
    finite = crit[np.isfinite(crit)]
    use_log = finite.size > 1 and finite.min() > 0 and finite.max() / finite.min() > 20
    if finite.size:
        lo, hi = finite.min(), finite.max()
    else:
        lo, hi = 1.0, 10.0
    if use_log:
        y_bot, y_top = lo / 1.6, hi * 1.6
    else:
        pad = 0.12 * (hi - lo) if hi > lo else 0.5 * abs(hi) + 1
        y_bot, y_top = lo - pad, hi + pad
    n = len(names)
    cols = min(n, 3)
    rows = math.ceil(n / cols)
    with plt.rc_context(_STYLE):
        fig, axes = plt.subplots(rows, cols, figsize=(3.2 * cols + 0.6, 2.9 * rows + 1.3),
                                 dpi=dpi or 100, sharey=True, squeeze=False)
        height = 2.9 * rows + 1.3
        fig.subplots_adjust(left=0.09, right=0.98, top=1 - 0.75 / height, bottom=1.15 / height,
                            wspace=0.08, hspace=0.55)
        present = [d for d in DESIGN_COLOURS if d in set(design)] + \
                  sorted(set(design) - set(DESIGN_COLOURS))
        # big sets first so the small ones (corners) stay visible on top
        order = sorted(present, key=lambda d: -int((design == d).sum()))
        k_ref = summary["reference_gain"]
        for k, name in enumerate(names):
            ax = axes[k // cols][k % cols]
            x, xlabel = _scaled(ds, name)
            for d in order:
                m = design == d
                c = DESIGN_COLOURS.get(d, GREY)
                f = m & np.isfinite(crit)
                ax.scatter(x[f], crit[f], s=12 if d not in ("nominal",) else 0, color=c, alpha=0.75,
                           lw=0, zorder=3)
                inf_m = m & np.isposinf(crit)
                ax.scatter(x[inf_m], np.full(inf_m.sum(), y_top), marker="^", s=22, color=c,
                           clip_on=False, zorder=3)
                u = m & unstable
                ax.scatter(x[u], np.full(u.sum(), y_bot), marker="x", s=20, color=c, lw=1,
                           clip_on=False, zorder=3)
            if nom is not None and np.isfinite(crit[nom]):
                ax.scatter([x[nom]], [crit[nom]], marker="D", s=46, color=BLACK, zorder=5)
            if wi is not None:
                yw = crit[wi] if np.isfinite(crit[wi]) else (y_bot if unstable[wi] else y_top)
                ax.scatter([x[wi]], [yw], s=150, facecolor="none", edgecolor=VERMILLION, lw=2,
                           zorder=6, clip_on=False)
            if k_ref > 0 and y_bot < k_ref < y_top:
                ax.axhline(k_ref, color=REFERENCE, lw=1.2, ls="--", zorder=2)
            ax.set_xlabel(xlabel)
            ax.set_yscale("log" if use_log else "linear")
            ax.set_ylim(y_bot, y_top)
            if k % cols == 0:
                ax.set_ylabel("critical gain")
        for k in range(n, rows * cols):
            axes[k // cols][k % cols].set_visible(False)
        handles = [Line2D([], [], marker="o", ls="none", color=DESIGN_COLOURS.get(d, GREY), ms=5,
                          label=f"{d} ({int((design == d).sum())})") for d in present if d != "nominal"]
        handles.append(Line2D([], [], marker="D", ls="none", color=BLACK, ms=6, label="nominal"))
        handles.append(Line2D([], [], marker="o", ls="none", mfc="none", mec=VERMILLION, mew=2, ms=11,
                              label="worst case"))
        if k_ref > 0 and y_bot < k_ref < y_top:
            handles.append(Line2D([], [], color=REFERENCE, ls="--", label=f"reference gain {_fmt(k_ref)}"))
        if np.isposinf(crit).any():
            handles.append(Line2D([], [], marker="^", ls="none", color=GREY,
                                  label=f"inf, drawn at top ({int(np.isposinf(crit).sum())})"))
        if unstable.any():
            handles.append(Line2D([], [], marker="x", ls="none", color=GREY,
                                  label=f"unstable at reference gain ({int(unstable.sum())})"))
        fig.legend(handles=handles, loc="lower center", ncol=min(len(handles), 4), frameon=False,
                   bbox_to_anchor=(0.5, 0.0))
        _title(fig, ds, ("Critical gain against each uncertain parameter" if query.uncertain_names(ds)
                         else "Critical gain against each parameter (none varies)")
               + (" (log scale)" if use_log else ""))
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
        fig, ax = plt.subplots(figsize=(7.2, 4.6), dpi=dpi or 100)
        fig.subplots_adjust(left=0.13, right=0.97, top=0.84, bottom=0.13)
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
        ax.set_xscale("log")
        if g.size:
            ax.set_xlim(g.min(), g.max())
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
            y0, y1 = -1.5 * max(-lo_y, linthresh), 1.5 * max(hi_y, linthresh)
            ax.set_ylim(y0, y1)
            e0 = math.ceil(math.log10(linthresh))
            ticks = [0.0]
            for e in range(e0, 300):
                t = 10.0**e
                if t > max(-y0, y1):
                    break
                ticks += [t] if t <= y1 else []
                ticks += [-t] if -t >= y0 else []
            from matplotlib.ticker import EngFormatter

            eng = EngFormatter(sep="")
            ax.set_yticks(sorted(ticks))
            ax.set_yticklabels([eng(t) if abs(t) >= 1e4 else f"{t:g}" for t in sorted(ticks)])
            ax.text(1.0, -0.1, f"y: symmetric log scale, linear within ±{linthresh:.2g}",
                    transform=ax.transAxes, ha="right", va="top", fontsize=7, color="#595959")
        else:
            span = hi_y - lo_y if hi_y > lo_y else 1.0
            ax.set_ylim(lo_y - 0.05 * span, hi_y + 0.05 * span)
        ax.set_xlabel(_label(ds, "gain", "loop gain k"))
        ax.set_ylabel(ylabel)
        ax.legend(handles=handles, loc="upper left", framealpha=0.92)
        _title(fig, ds, f"Stability envelope over {summary['n_variants']} variants "
                        "(above zero: some variant unstable)")
    return fig


# ------------------------------------------------------------------ crossings

def crossings_figure(ds: xr.Dataset, *, dpi: float | None = None):
    """Histograms of the critical gain and the crossing frequency.

    Worst case and nominal are marked; infinite critical gains and variants
    unstable at the reference gain are counted in a note (they have no bar).

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
    from matplotlib.lines import Line2D

    crit, unstable = _crit_for_plot(ds)
    freq = np.asarray(ds["crossing_frequency"].values, float)
    summary = query.summarize(ds)
    w = summary["worst"]
    nom = summary["nominal"]
    with plt.rc_context(_STYLE):
        fig, axes = plt.subplots(1, 2, figsize=(8.4, 4.0), dpi=dpi or 100)
        fig.subplots_adjust(left=0.08, right=0.98, top=0.82, bottom=0.25, wspace=0.22)
        for ax, data, label, wv, nv in (
            (axes[0], crit, "critical gain", w["critical_gain"] if w else None,
             nom["critical_gain"] if nom else None),
            (axes[1], freq, _label(ds, "crossing_frequency", "crossing frequency"),
             w["crossing_frequency"] if w else None, nom["crossing_frequency"] if nom else None),
        ):
            f = data[np.isfinite(data) & (data > 0)]
            zero_count = int(np.sum(data == 0))
            log = f.size > 1 and f.max() / f.min() > 20
            if f.size:
                bins = (np.geomspace(f.min(), f.max() * 1.0001, 31) if log
                        else np.linspace(f.min(), f.max() + 1e-12 * max(1, abs(f.max())), 31))
                if f.min() == f.max():
                    bins = 10
                ax.hist(f, bins=bins, color=SKY, edgecolor=BLUE, lw=0.5, zorder=2)
            if log:
                from matplotlib.ticker import LogLocator, NullFormatter

                ax.set_xscale("log")
                ax.xaxis.set_minor_formatter(NullFormatter())  # minor labels collide
                from matplotlib.ticker import FuncFormatter

                ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
                ax.set_xlim(f.min() / 1.15, f.max() * 1.15)
            elif f.size:
                pad = 0.04 * (f.max() - f.min() or abs(f.max()) or 1.0)
                ax.set_xlim(f.min() - pad, f.max() + pad)
            for val, colour, ls in ((wv, VERMILLION, "-"), (nv, BLACK, "--")):
                if val is not None and math.isfinite(val) and val > 0:
                    ax.axvline(val, color=colour, lw=1.8, ls=ls, zorder=4)
                    ax.annotate(_fmt(val), (val, 1.0), xycoords=("data", "axes fraction"),
                                xytext=(3, -2), textcoords="offset points", ha="left", va="top",
                                fontsize=7.5, color=colour)
            ax.set_xlabel(label + (" (log scale)" if log else ""))
            ax.set_ylabel("variants")
            note = []
            if zero_count:
                note.append(f"{zero_count} at 0 (through the origin)")
            if note:
                ax.text(0.98, 0.97, "\n".join(note), transform=ax.transAxes, ha="right", va="top",
                        fontsize=7.5)
        n_inf = int(np.isposinf(crit).sum())
        n_un = int(unstable.sum())
        msg = [f"{int(np.isfinite(crit).sum())} variants with a finite critical gain"]
        if n_inf:
            msg.append(f"{n_inf} never lose stability in the gain range (critical gain inf, no bar)")
        if n_un:
            msg.append(f"{n_un} unstable at the reference gain (no bar)")
            if w:
                msg.append(f"worst case: variant {w['variant']} ({w['design']}), unstable at the "
                           "reference gain, so no worst-case line")
        k_ref = summary["reference_gain"]
        if k_ref > 0:
            axes[0].axvline(k_ref, color=REFERENCE, lw=1.4, ls=":", zorder=4)
        handles = [Line2D([], [], color=VERMILLION, lw=1.8, label="worst case"),
                   Line2D([], [], color=BLACK, lw=1.8, ls="--", label="nominal")]
        if k_ref > 0:
            handles.append(Line2D([], [], color=REFERENCE, lw=1.4, ls=":", label="reference gain"))
        fig.legend(handles=handles, loc="lower right", ncol=len(handles), frameon=False,
                   bbox_to_anchor=(0.99, 0.06))
        fig.text(0.01, 0.015, "\n".join(["; ".join(msg[:2])] + msg[2:]), fontsize=8,
                 color="#404040", ha="left", va="bottom")
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
    a, b, table = plane_table(ds, params)
    plt = _plt()
    from matplotlib.colors import LogNorm, Normalize
    from matplotlib.patches import Patch

    val = table["value"]
    # axis values with a power of ten moved into the label, as in the limits plot
    _sa, la_label = _scaled(ds, a)
    _sb, lb_label = _scaled(ds, b)
    fa = _sa[0] / float(ds[a].values[0]) if float(ds[a].values[0]) else 1.0
    fb = _sb[0] / float(ds[b].values[0]) if float(ds[b].values[0]) else 1.0
    xa, xb = table["a"] * fa, table["b"] * fb
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
            extra.append(Patch(fc="white", ec=GREEN, hatch="///", label="inf: never unstable in range"))
        if np.isnan(val).any():
            extra.append(Patch(fc="#f3c9b1", ec=VERMILLION, hatch="xx", label="unstable at reference gain"))
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
            extra.append(plt.Line2D([], [], marker="s", ls="none", mfc="none", mec=VERMILLION, mew=2,
                                    ms=10, label="smallest finite value"))
        nom = _nominal_index(ds)
        if nom is not None:
            # cross-hair lines, so the cell's number stays readable
            from matplotlib import patheffects

            halo = [patheffects.withStroke(linewidth=3.2, foreground=BLACK)]
            ax.axvline(float(ds[a].values[nom]) * fa, color=ORANGE, lw=1.6, ls=(0, (4, 2)),
                       path_effects=halo)
            ax.axhline(float(ds[b].values[nom]) * fb, color=ORANGE, lw=1.6, ls=(0, (4, 2)),
                       path_effects=halo)
            extra.append(plt.Line2D([], [], color=ORANGE, lw=1.6, ls=(0, (4, 2)),
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
            fig.legend(handles=extra, loc="lower center", ncol=min(len(extra), 2), frameon=False,
                       bbox_to_anchor=(0.5, 0.0))
        _title(fig, ds, f"Critical gain over {a} and {b} ({table['n_variants']} grid variants, "
                        f"minimum over {', '.join(table['others']) or 'nothing else'})")
    return fig


def _cell(ex, ey, i, j, **kw):
    from matplotlib.patches import Rectangle

    return Rectangle((ex[i], ey[j]), ex[i + 1] - ex[i], ey[j + 1] - ey[j], lw=0.6, **kw)


def plane_table(ds: xr.Dataset, params: Sequence[str] | None) -> tuple[str, str, dict[str, Any]]:
    """The numbers behind the plane plot.

    Parameters
    ----------
    ds
        A result dataset.
    params
        Two parameter names.

    Returns
    -------
    (a, b, table)
        ``table`` holds ``a`` and ``b`` (sorted grid levels), ``value`` shaped
        ``(len(b), len(a))``: at each level pair the smallest critical gain
        over the grid variants there (``inf`` if all are inf, NaN if any is
        unstable at the reference gain), ``others`` (the remaining uncertain
        parameters) and ``n_variants``.

    Raises
    ------
    InputError
        When the dataset has no grid design or the parameters are not in it.
    """
    design = _design(ds)
    present = sorted(set(design))
    if params is None or len(params) != 2:
        raise InputError("plot 'plane' needs exactly two parameters, e.g. --params "
                         + " ".join((query.uncertain_names(ds) + ["A", "B"])[:2]), field="params")
    a, b = (str(p) for p in params)
    if a == b:
        raise InputError(f"plot 'plane': the two parameters must differ (got {a} twice)",
                         field="params")
    known = query.parameter_names(ds)
    for p in (a, b):
        if p not in known:
            close = difflib.get_close_matches(p, known, n=1, cutoff=0.5)
            hint = f"; did you mean '{close[0]}'?" if close else f"; parameters: {', '.join(known)}"
            raise InputError(f"plot 'plane': no parameter '{p}' in the result{hint}", field="params")
    if "grid" not in present:
        raise InputError("plot 'plane' uses the grid design, which this result lacks (designs: "
                         f"{', '.join(present)}); add \"grid\" to [sweep] designs (levels = 5 or so) "
                         "and rerun 'sweep run'", field="sweep.designs")
    m = design == "grid"
    crit, unstable = _crit_for_plot(ds)
    xa = np.asarray(ds[a].values, float)[m]
    xb = np.asarray(ds[b].values, float)[m]
    for p, x in ((a, xa), (b, xb)):
        if np.ptp(x) == 0:
            raise InputError(f"plot 'plane': parameter '{p}' does not vary over the grid design "
                             f"(it is fixed); choose among {', '.join(query.uncertain_names(ds))}",
                             field="params")
    la, ia = np.unique(xa, return_inverse=True)
    lb, ib = np.unique(xb, return_inverse=True)
    y = np.where(unstable[m], np.nan, crit[m])
    val = np.full((lb.size, la.size), np.inf)
    np.minimum.at(val, (ib, ia), np.where(np.isnan(y), np.inf, y))
    bad = np.zeros_like(val, bool)
    np.logical_or.at(bad, (ib, ia), np.isnan(y))
    val[bad] = np.nan
    others = [n for n in query.uncertain_names(ds) if n not in (a, b)]
    return a, b, {"a": la, "b": lb, "value": val, "others": others, "n_variants": int(m.sum())}


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
    plt = _plt()
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        meta = {"Creator": "sweep"} if fmt in ("pdf", "svg") else None
        fig.savefig(out, format=fmt, dpi=dpi or 150, metadata=meta)
    finally:
        plt.close(fig)
    return out
