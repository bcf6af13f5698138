"""Questions asked of a result dataset: worst case, robust interval, quantiles, sensitivity.

Pure: an ``xarray.Dataset`` (the schema of DESIGN section 4) in, plain dicts
out.  Numbers stay Python floats (``inf`` and ``nan`` included); the command
line turns them into JSON with `sweep.jsonutil`.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import xarray as xr

from .errors import InputError

QUANTILES = ("0.001", "0.01", "0.05", "0.5", "0.95")
SAMPLED_DESIGNS = ("random", "lhs", "sobol")
LEVEL_DESIGNS = ("corners", "grid")
# fewer sampled variants than this and rank correlation says little; use levels instead
MIN_SAMPLES_FOR_RANKS = 10


def _f(x: Any) -> float | None:
    """A plain float (inf and nan kept), or None for a missing value."""
    if x is None:
        return None
    return float(x)


def _nan_to_none(x: float | None) -> float | None:
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else x


def _require(ds: xr.Dataset, names: tuple[str, ...], source: str | None = None) -> None:
    missing = [n for n in names if n not in ds.variables]
    if missing:
        raise InputError(
            f"not a sweep result: variable(s) {', '.join(missing)} missing; "
            "rerun 'sweep run' to produce a complete result file",
            file=source or ds.encoding.get("source"), field=missing[0])


def parameter_names(ds: xr.Dataset) -> list[str]:
    """Every parameter coordinate (fixed ones too), in dataset order.

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    list of str
        Names of the float coordinates along ``variant`` other than ``variant``
        and ``design``.
    """
    out = []
    for name, c in ds.coords.items():
        if name in ("variant", "design", "locus_variant") or c.dims != ("variant",):
            continue
        if np.issubdtype(c.dtype, np.number):
            out.append(str(name))
    return out


def uncertain_names(ds: xr.Dataset) -> list[str]:
    """Parameters whose values differ between variants.

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    list of str
    """
    out = []
    for n in parameter_names(ds):
        v = np.asarray(ds[n].values, float)
        if v.size and np.nanmax(v) > np.nanmin(v):
            out.append(n)
    return out


def reference_gain(ds: xr.Dataset) -> float:
    """The reference gain of the sweep.

    Taken from the ``reference_gain`` attribute, else ``operating_gain``, else
    from the config text stored in the ``config`` attribute (operating gain,
    else the lower end of the gain range).

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    float
    """
    for key in ("reference_gain", "operating_gain"):
        if key in ds.attrs:
            return float(ds.attrs[key])
    text = ds.attrs.get("config")
    if text:
        try:
            from .config import parse_config

            cfg = parse_config(str(text), source="<result file>")
        except Exception as exc:  # noqa: BLE001 - report as bad input below
            raise InputError(f"the stored config cannot be read ({exc}); rerun 'sweep run'",
                             field="config") from None
        if cfg.operating_gain is not None:
            return float(cfg.operating_gain)
        return float(cfg.gain_range[0])
    raise InputError("no reference gain stored (attributes reference_gain, operating_gain and "
                     "config are all missing); rerun 'sweep run'", field="reference_gain")


def operating_gain(ds: xr.Dataset) -> float | None:
    """The operating gain, or None when the sweep has none.

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    float or None
    """
    if "operating_gain" in ds.attrs:
        g = float(ds.attrs["operating_gain"])
        return None if math.isnan(g) else g
    if "reference_gain" in ds.attrs:
        return None
    text = ds.attrs.get("config")
    if text:
        try:
            from .config import parse_config

            cfg = parse_config(str(text), source="<result file>")
            return None if cfg.operating_gain is None else float(cfg.operating_gain)
        except Exception:  # noqa: BLE001 - no operating gain known
            return None
    return None


def ranked_quantile(values: np.ndarray, q: float, *, low_missing: int = 0) -> float:
    """The ``q`` quantile with numpy's "linear" rule, safe with ``inf`` and unknowns.

    Parameters
    ----------
    values
        Finite or ``+inf`` values (NaN not allowed here).
    q
        Probability in [0, 1].
    low_missing
        Count of further variants that rank *below* every value but have no
        value (unstable at the reference gain). A quantile whose interpolation
        touches one of them is NaN.

    Returns
    -------
    float
        ``inf`` when the quantile's position falls among (or interpolates with
        a nonzero weight toward) infinite values; NaN as described above.
    """
    v = np.sort(np.asarray(values, float))
    n = v.size + low_missing
    if n == 0:
        return math.nan
    h = (n - 1) * q
    lo = int(math.floor(h))
    hi = min(lo + 1, n - 1)
    frac = h - lo

    def at(i: int) -> float:
        return math.nan if i < low_missing else float(v[i - low_missing])

    a = at(lo)
    if frac == 0.0 or hi == lo:
        return a
    b = at(hi)
    if math.isnan(a) or math.isnan(b):
        return math.nan
    if math.isinf(b):  # a + frac*(inf - a) with frac > 0; numpy would give inf or nan
        return math.inf
    return a + frac * (b - a)


def _ranked_stats(values: np.ndarray, known_unstable: np.ndarray) -> dict[str, float]:
    """Quantiles of ``values`` with ``known_unstable`` variants ranked lowest."""
    good = values[~known_unstable & ~np.isnan(values)]
    return {q: ranked_quantile(good, float(q), low_missing=int(known_unstable.sum()))
            for q in QUANTILES}


def _parameters_of(ds: xr.Dataset, i: int) -> dict[str, float]:
    return {n: float(ds[n].values[i]) for n in parameter_names(ds)}


def _worst_unstable(ds: xr.Dataset, unstable: np.ndarray, k_ref: float) -> tuple[int, float, str]:
    """The unstable variant reaching furthest into the right half plane at the reference gain.

    Returns (index, largest real part or NaN, basis) where basis says where
    the roots came from.
    """
    idx = np.flatnonzero(unstable)
    if "closed_loop_pole_real" in ds:
        re = np.asarray(ds["closed_loop_pole_real"].values, float)[idx]
        if re.ndim == 2 and np.isfinite(re).any(axis=1).all():
            m = np.nanmax(re, axis=1)
            j = int(np.argmax(m))
            return int(idx[j]), float(m[j]), "closed-loop poles at the reference gain"
    lo_range = 0.0
    if k_ref == lo_range and "open_loop_pole_real" in ds:
        # the reference is the range start approached from above: the roots are the open-loop poles
        re = np.asarray(ds["open_loop_pole_real"].values, float)[idx]
        if re.ndim == 2 and np.isfinite(re).any(axis=1).all():
            m = np.nanmax(re, axis=1)
            j = int(np.argmax(m))
            return int(idx[j]), float(m[j]), "open-loop poles (reference gain is the range start)"
    if "locus_real" in ds and ds.sizes.get("locus_variant", 0) and ds.sizes.get("gain", 0):
        lv = np.asarray(ds["locus_variant"].values, int)
        hit = np.isin(lv, idx)
        if hit.any():
            gains = np.asarray(ds["gain"].values, float)
            g = int(np.argmin(np.abs(gains - k_ref)))
            re = np.asarray(ds["locus_real"].values[hit, g, :], float)
            m = np.nanmax(re, axis=1)
            j = int(np.argmax(m))
            return int(lv[hit][j]), float(m[j]), (
                f"stored loci at the grid gain {gains[g]:.6g} nearest the reference gain "
                f"({int(hit.sum())} of {idx.size} unstable variants have a stored locus)")
    return int(idx[0]), math.nan, "first unstable variant (no closed-loop roots stored)"


def _sensitivity(ds: xr.Dataset, crit: np.ndarray, unstable: np.ndarray, k_ref: float,
                 nominal_crit: float | None) -> tuple[list[dict], dict]:
    """Parameter influence on the critical gain; see `summarize`."""
    names = uncertain_names(ds)
    design = np.asarray(ds["design"].values).astype(str)
    sampled = np.isin(design, SAMPLED_DESIGNS)
    levelled = np.isin(design, LEVEL_DESIGNS)
    if not names:
        return [], {"measure": None, "designs": [], "note": "no uncertain parameters"}
    if sampled.sum() >= MIN_SAMPLES_FOR_RANKS:
        from scipy.stats import spearmanr

        # ranks: unstable variants lowest (-inf), inf highest; numpy ranks both ends fine
        y = np.where(unstable, -np.inf, crit)[sampled]
        keep = ~np.isnan(y)
        out = []
        for n in names:
            x = np.asarray(ds[n].values, float)[sampled][keep]
            if np.ptp(x) == 0 or np.unique(y[keep]).size < 2:
                rho = 0.0
            else:
                rho = float(spearmanr(x, y[keep]).statistic)
                rho = 0.0 if math.isnan(rho) else rho
            out.append({"parameter": n, "score": rho, "measure": "spearman"})
        out.sort(key=lambda d: -abs(d["score"]))
        used = sorted(set(design[sampled]), key=list(SAMPLED_DESIGNS).index)
        return out, {"measure": "spearman", "designs": used,
                     "note": "Spearman rank correlation of each parameter with the critical gain; "
                             "infinite critical gains rank highest, variants unstable at the "
                             "reference gain rank lowest"}
    if levelled.sum() >= 2:
        y = crit[levelled].copy()
        uns = unstable[levelled]
        finite = y[np.isfinite(y)]
        cap = float(finite.max()) if finite.size else k_ref
        y = np.where(uns, k_ref, y)  # no margin at all: the stable interval ends at or below k_ref
        y = np.where(np.isposinf(y), cap, y)
        out = []
        for n in names:
            x = np.asarray(ds[n].values, float)[levelled]
            ok = ~np.isnan(y)
            hi = ok & np.isclose(x, x.max())
            lo = ok & np.isclose(x, x.min())
            effect = float(y[hi].mean() - y[lo].mean()) if hi.any() and lo.any() else 0.0
            entry = {"parameter": n, "score": effect, "measure": "main effect"}
            if nominal_crit is not None and math.isfinite(nominal_crit) and nominal_crit > 0:
                entry["relative"] = effect / nominal_crit
            out.append(entry)
        out.sort(key=lambda d: -abs(d["score"]))
        used = sorted(set(design[levelled]), key=list(LEVEL_DESIGNS).index)
        return out, {"measure": "main effect", "designs": used,
                     "note": "mean critical gain at the high level minus at the low level, in gain "
                             "units ('relative': over the nominal critical gain); infinite critical "
                             "gains are capped at the largest finite one, variants unstable at the "
                             "reference gain count as the reference gain"}
    return [], {"measure": None, "designs": [],
                "note": "needs a random, lhs or sobol design (>= 10 variants) or corners/grid"}


def _operating(ds: xr.Dataset, unstable: np.ndarray) -> dict | None:
    k0 = operating_gain(ds)
    out: dict[str, Any] = {"gain": k0}
    any_data = False
    for name, better in (("gain_margin", "min"), ("min_damping", "min")):
        if name not in ds:
            out[name] = None
            continue
        v = np.asarray(ds[name].values, float)
        if np.isnan(v).all():
            out[name] = None
            continue
        any_data = True
        # gain margin has no value for unstable variants: they rank lowest
        missing = unstable & np.isnan(v)
        have = ~np.isnan(v)
        i = int(np.flatnonzero(have)[np.argmin(v[have])])
        out[name] = {
            "worst": {"variant": int(ds["variant"].values[i]), "design": str(ds["design"].values[i]),
                      "value": float(v[i])},
            "quantiles": _ranked_stats(np.where(missing, np.nan, v), missing),
            "without_value": int((~have).sum()),
        }
    return out if any_data else None


def summarize(ds: xr.Dataset, certificate: dict | None = None) -> dict[str, Any]:
    """The answers of ``sweep query`` as a plain dict (the ``--json`` fields and a few more).

    Parameters
    ----------
    ds
        A result dataset (DESIGN section 4).
    certificate
        Output of ``sweep certify`` (keys ``lower``, ``upper``, ``method``,
        ``exact``) to show beside the sampled worst case. When None, the
        dataset attributes ``certified_lower``, ``certified_upper``,
        ``certified_method``, ``certified_exact`` are used if present.

    Returns
    -------
    dict
        ``n_variants``, ``reference_gain``; ``worst`` {``variant``, ``design``,
        ``critical_gain``, ``crossing_frequency``, ``parameters``, ``basis``,
        ``max_real_part``}: the smallest critical gain, or, when some variant
        is unstable at the reference gain, the one whose roots there reach
        furthest right (``critical_gain`` NaN; ``basis`` says where those roots
        came from); ``nominal`` {``critical_gain``, ``crossing_frequency``} or
        None; ``robust_gain_interval`` ``[max critical_gain_low, min
        critical_gain]`` or None (a variant unstable at the reference gain, or
        an empty intersection); ``unstable_at_reference``; ``infinite`` (count
        of ``inf`` critical gains); ``not_computed`` (stable at the reference
        gain but NaN, flagged ill-conditioned; left out of the quantiles); ``quantiles`` of the critical gain (numpy's
        linear rule; a position among infinite values gives ``inf``; a position
        touching a variant unstable at the reference gain, which ranks lowest,
        gives NaN); ``sensitivity`` (list of {``parameter``, ``score``,
        ``measure``}, largest ``|score|`` first) and ``sensitivity_method``;
        ``operating`` (worst and quantiles of ``gain_margin`` and
        ``min_damping``) or None; ``certified`` {``lower``, ``upper``,
        ``method``, ``exact``} or None.

    Raises
    ------
    InputError
        When the dataset lacks the variables a result file always has.
    """
    _require(ds, ("critical_gain", "critical_gain_low", "crossing_frequency", "design"))
    crit = np.asarray(ds["critical_gain"].values, float)
    low = np.asarray(ds["critical_gain_low"].values, float)
    freq = np.asarray(ds["crossing_frequency"].values, float)
    design = np.asarray(ds["design"].values).astype(str)
    variants = np.asarray(ds["variant"].values)
    V = crit.size
    k_ref = reference_gain(ds)
    if "stable_at_reference" in ds:
        unstable = np.asarray(ds["stable_at_reference"].values) == 0
    else:
        unstable = np.isnan(crit)
    n_unstable = int(unstable.sum())

    out: dict[str, Any] = {"n_variants": int(V), "reference_gain": float(k_ref)}
    if V == 0:
        out.update(worst=None, nominal=None, robust_gain_interval=None, unstable_at_reference=0,
                   infinite=0, not_computed=0, quantiles={q: math.nan for q in QUANTILES}, sensitivity=[],
                   sensitivity_method={"measure": None, "designs": [], "note": "no variants"},
                   operating=None, certified=_certified(ds, certificate))
        return out

    if n_unstable:
        i, reach, basis = _worst_unstable(ds, unstable, k_ref)
        worst_crit, worst_freq = math.nan, math.nan
    else:
        usable = ~np.isnan(crit)
        if not usable.any():
            raise InputError("every critical gain is NaN although every variant is stable at the "
                             "reference gain; the result is damaged, rerun 'sweep run'",
                             field="critical_gain")
        cand = np.flatnonzero(usable)
        i = int(cand[np.argmin(crit[usable])])
        reach, basis = math.nan, "smallest critical gain"
        worst_crit, worst_freq = float(crit[i]), float(freq[i])
    out["worst"] = {
        "variant": int(variants[i]), "design": str(design[i]),
        "critical_gain": worst_crit, "crossing_frequency": worst_freq,
        "parameters": _parameters_of(ds, i), "basis": basis, "max_real_part": reach,
    }

    nom = np.flatnonzero(design == "nominal")
    out["nominal"] = (None if nom.size == 0 else
                      {"critical_gain": float(crit[nom[0]]), "crossing_frequency": float(freq[nom[0]])})

    if n_unstable or np.isnan(crit).any():
        out["robust_gain_interval"] = None
    else:
        lo_i, hi_i = float(np.max(low)), float(np.min(crit))
        out["robust_gain_interval"] = [lo_i, hi_i] if lo_i < hi_i else None
    out["unstable_at_reference"] = n_unstable
    out["infinite"] = int(np.isposinf(crit).sum())
    # stable at the reference gain but no number (flagged ill-conditioned): left out of quantiles
    out["not_computed"] = int((~unstable & np.isnan(crit)).sum())
    out["quantiles"] = _ranked_stats(np.where(unstable, np.nan, crit), unstable)
    out["quantile_note"] = ("variants unstable at the reference gain rank lowest; a quantile that "
                            "falls on them is null") if n_unstable else ""
    nominal_crit = None if out["nominal"] is None else out["nominal"]["critical_gain"]
    out["sensitivity"], out["sensitivity_method"] = _sensitivity(ds, crit, unstable, k_ref,
                                                                nominal_crit)
    out["operating"] = _operating(ds, unstable)
    out["certified"] = _certified(ds, certificate)
    return out


def _certified(ds: xr.Dataset, certificate: dict | None) -> dict | None:
    if certificate is not None:
        return {"lower": _f(certificate.get("lower")), "upper": _f(certificate.get("upper")),
                "method": certificate.get("method"), "exact": bool(certificate.get("exact", False))}
    a = ds.attrs
    if "certified_lower" in a or "certified_upper" in a:
        return {"lower": _f(a.get("certified_lower")), "upper": _f(a.get("certified_upper")),
                "method": a.get("certified_method"),
                "exact": bool(int(a.get("certified_exact", 0)))}
    return None


# ---------------------------------------------------------------- text report

def _num(x: Any) -> str:
    if x is None:
        return "-"
    x = float(x)
    if math.isnan(x):
        return "-"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.6g}"


def _units(ds: xr.Dataset, name: str) -> str:
    if name in ds.variables:
        u = str(ds[name].attrs.get("units", ""))
        return "" if u in ("1", "") else u
    return ""


def format_summary(summary: dict, ds: xr.Dataset) -> str:
    """A plain-text report of `summarize`'s result, aligned, with units.

    Parameters
    ----------
    summary
        The dict returned by `summarize`.
    ds
        The dataset it came from (for the title and parameter units).

    Returns
    -------
    str
        Lines separated by newlines, no trailing newline.
    """
    lines: list[str] = []
    title = str(ds.attrs.get("title", "")).strip()
    if title:
        lines += [title, "=" * len(title)]
    rows: list[tuple[str, str]] = [
        ("variants", str(summary["n_variants"])),
        ("reference gain", _num(summary["reference_gain"])),
        ("unstable at reference gain", str(summary["unstable_at_reference"])),
        ("infinite critical gains", str(summary.get("infinite", 0))),
    ]
    if summary.get("not_computed"):
        rows.append(("not computed (ill-conditioned)", str(summary["not_computed"])))
    nom = summary.get("nominal")
    if nom:
        rows.append(("nominal critical gain", _num(nom["critical_gain"])))
        rows.append(("nominal crossing frequency", f"{_num(nom['crossing_frequency'])} rad/s"))
    rgi = summary.get("robust_gain_interval")
    rows.append(("robust gain interval",
                 f"({_num(rgi[0])}, {_num(rgi[1])})" if rgi else "none (no common stable interval)"))
    w = summary.get("worst")
    lines += _table(rows)
    if w:
        lines += ["", f"Worst case: variant {w['variant']} ({w['design']})"]
        wrows = []
        if summary["unstable_at_reference"]:
            wrows.append(("unstable at reference gain", "yes"))
            wrows.append(("largest real part of a root", f"{_num(w['max_real_part'])} 1/s"))
            wrows.append(("chosen by", w["basis"]))
        else:
            wrows.append(("critical gain", _num(w["critical_gain"])))
            wrows.append(("crossing frequency", f"{_num(w['crossing_frequency'])} rad/s"))
        cert = summary.get("certified")
        if cert:
            kind = "exact" if cert.get("exact") else "guaranteed bounds"
            wrows.append(("certified worst case",
                          f"[{_num(cert['lower'])}, {_num(cert['upper'])}] ({cert.get('method')}, {kind})"))
        lines += _table(wrows, indent=2)
        lines.append("  parameters:")
        prow = []
        for n, v in w["parameters"].items():
            u = _units(ds, n)
            prow.append((n, f"{_num(v)} {u}".rstrip()))
        lines += _table(prow, indent=4)
    q = summary.get("quantiles") or {}
    lines += ["", "Critical gain quantiles:"]
    lines += _table([(f"q {k}", _num(v)) for k, v in q.items()], indent=2)
    if summary.get("quantile_note"):
        lines.append("  (" + summary["quantile_note"] + ")")
    sens = summary.get("sensitivity") or []
    meth = summary.get("sensitivity_method") or {}
    if sens:
        lines += ["", f"Sensitivity ({meth.get('measure')}, designs: {', '.join(meth.get('designs', []))}):"]
        lines += _table([(d["parameter"], f"{d['score']:+.3f}") for d in sens], indent=2)
    op = summary.get("operating")
    if op:
        lines += ["", f"At the operating gain {_num(op['gain'])}:"]
        orows = []
        for name, label in (("gain_margin", "gain margin"), ("min_damping", "minimum damping")):
            d = op.get(name)
            if not d:
                continue
            wv = d["worst"]
            qs = "  ".join(f"{k}: {_num(v)}" for k, v in d["quantiles"].items())
            extra = (f"; {d['without_value']} variants have no value (unstable)"
                     if d["without_value"] else "")
            orows += [(label + ", worst", f"{_num(wv['value'])} (variant {wv['variant']}, "
                                          f"{wv['design']}{extra})"),
                      (label + ", quantiles", qs)]
        lines += _table(orows, indent=2)
    return "\n".join(lines)


def _table(rows: list[tuple[str, str]], indent: int = 0) -> list[str]:
    if not rows:
        return []
    width = max(len(a) for a, _ in rows)
    return [" " * indent + f"{a:<{width}}  {b}" for a, b in rows]
