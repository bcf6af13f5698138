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


def stored_config(ds: xr.Dataset):
    """The `~sweep.config.Config` of the TOML text stored in a result, or None without one.

    The config's own warnings (an unused parameter, a cancellation, ...) were
    shown when the sweep ran; reading a result does not repeat them. Errors
    of the stored text propagate to the caller.
    """
    import warnings

    from .config import parse_config
    from .warnings import SweepWarning

    text = ds.attrs.get("config")
    if not text:
        return None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SweepWarning)
        return parse_config(str(text), source="<result file>")


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
    if ds.attrs.get("config"):
        try:
            cfg = stored_config(ds)
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
    if ds.attrs.get("config"):
        try:
            cfg = stored_config(ds)
            return None if cfg.operating_gain is None else float(cfg.operating_gain)
        except Exception:  # noqa: BLE001 - no operating gain known
            return None
    return None


def gain_range(ds: xr.Dataset) -> tuple[float, float] | None:
    """The ``gain_range`` of the sweep from the stored config text, or None when unknown.

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    tuple of float or None
        ``(low, high)``; ``high`` may be ``inf``.
    """
    try:
        cfg = stored_config(ds)
    except Exception:  # noqa: BLE001 - the range is only used to word the report
        return None
    if cfg is None:
        return None
    return float(cfg.gain_range[0]), float(cfg.gain_range[1])


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


def _design_of(ds: xr.Dataset) -> np.ndarray:
    return np.asarray(ds["design"].values).astype(str)


def _present(design: np.ndarray, mask: np.ndarray, order: tuple[str, ...] = ()) -> list[str]:
    """Design names under ``mask``, in the given order first, then alphabetically."""
    names = {str(d) for d in design[mask]}
    return [d for d in order if d in names] + sorted(names - set(order))


def quantile_basis(ds: xr.Dataset) -> tuple[np.ndarray, dict[str, Any]]:
    """Which variants the quantiles describe.

    Quantiles read as probabilities only over draws from the tolerance
    distribution, so they use the sampled designs (``random``, ``lhs``,
    ``sobol``) when these hold at least ``MIN_SAMPLES_FOR_RANKS`` variants: the
    nominal, the corners and grid points are chosen points, and corners would
    crowd the low tail. Otherwise every variant is used and the note says the
    numbers describe design points.

    Parameters
    ----------
    ds
        A result dataset.

    Returns
    -------
    mask : numpy.ndarray
        Bool ``(V,)``: the variants the quantiles are taken over.
    basis : dict
        ``designs`` (names), ``variants`` (count) and ``note``.
    """
    design = _design_of(ds)
    sampled = np.isin(design, SAMPLED_DESIGNS)
    if sampled.sum() >= MIN_SAMPLES_FOR_RANKS:
        return sampled, {"designs": _present(design, sampled, SAMPLED_DESIGNS),
                         "variants": int(sampled.sum()),
                         "note": "sampled designs only; the nominal, corners and grid points are "
                                 "chosen points, not draws from the tolerance distribution"}
    every = np.ones(design.size, bool)
    return every, {"designs": _present(design, every, ("nominal",) + LEVEL_DESIGNS + SAMPLED_DESIGNS),
                   "variants": int(design.size),
                   "note": "every variant: no sampled design (random, lhs, sobol) with "
                           f"{MIN_SAMPLES_FOR_RANKS} or more variants, so these describe the design "
                           "points, not probabilities"}


def _parameters_of(ds: xr.Dataset, i: int) -> dict[str, float]:
    return {n: float(ds[n].values[i]) for n in parameter_names(ds)}


def _closed_loop_poles(ds: xr.Dataset, i: int) -> list[complex] | None:
    """Closed-loop poles of variant ``i`` at the operating gain (None when not stored)."""
    if "closed_loop_pole_real" not in ds or "closed_loop_pole_imag" not in ds:
        return None
    re = np.asarray(ds["closed_loop_pole_real"].values[i], float)
    im = np.asarray(ds["closed_loop_pole_imag"].values[i], float)
    ok = np.isfinite(re) & np.isfinite(im)
    if not ok.any():
        return None
    return [complex(a, b) for a, b in zip(re[ok], im[ok])]


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
    if k_ref == 0.0 and operating_gain(ds) is None and "open_loop_pole_real" in ds:
        # the reference is the range start 0 approached from above: the roots are the open-loop poles
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


def _average_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n, ties sharing their mean rank (``inf`` and ``-inf`` rank like numbers)."""
    _vals, inverse, counts = np.unique(x, return_inverse=True, return_counts=True)
    upper = np.cumsum(counts)
    return (upper - 0.5 * (counts - 1))[inverse.ravel()].astype(float)


def spearman(x: np.ndarray, y: np.ndarray) -> float:
    """Spearman rank correlation: Pearson correlation of the average ranks (0 when undefined).

    Plain numpy (no scipy import on the query path); tests compare it with
    ``scipy.stats.spearmanr``.
    """
    rx, ry = _average_ranks(np.asarray(x, float)), _average_ranks(np.asarray(y, float))
    rx -= rx.mean()
    ry -= ry.mean()
    den = math.sqrt(float(rx @ rx) * float(ry @ ry))
    return 0.0 if den == 0 else float(rx @ ry) / den


def _one_value(crit: np.ndarray, unstable: np.ndarray, which: str) -> str:
    """Why the critical gain cannot be ranked over ``which`` (it takes one value there)."""
    if unstable.all():
        return f"every one of the {which} is unstable at the reference gain"
    if unstable.any():
        return (f"each one of the {which} is unstable at the reference gain or never loses "
                "stability")
    if np.isposinf(crit).all():
        return f"every one of the {which} keeps stability over the whole gain range (inf)"
    return f"the critical gain is the same for every one of the {which}"


def _sensitivity(ds: xr.Dataset, crit: np.ndarray, unstable: np.ndarray, k_ref: float,
                 nominal_crit: float | None) -> tuple[list[dict], dict]:
    """Parameter influence on the critical gain; see `summarize`."""
    names = uncertain_names(ds)
    design = _design_of(ds)
    sampled = np.isin(design, SAMPLED_DESIGNS)
    levelled = np.isin(design, LEVEL_DESIGNS)
    if not names:
        return [], {"measure": None, "designs": [], "note": "no uncertain parameters"}
    if sampled.sum() >= MIN_SAMPLES_FOR_RANKS:
        used = _present(design, sampled, SAMPLED_DESIGNS)
        # ranks: unstable variants lowest (-inf), inf highest; numpy ranks both ends fine
        y = np.where(unstable, -np.inf, crit)[sampled]
        keep = ~np.isnan(y)
        if np.unique(y[keep]).size < 2:
            return [], {"measure": None, "designs": used,
                        "note": "nothing to rank: " + _one_value(crit[sampled], unstable[sampled],
                                                                 "sampled variants")}
        out = []
        for n in names:
            x = np.asarray(ds[n].values, float)[sampled][keep]
            rho = 0.0 if np.ptp(x) == 0 else spearman(x, y[keep])
            out.append({"parameter": n, "score": rho, "measure": "spearman"})
        out.sort(key=lambda d: -abs(d["score"]))
        return out, {"measure": "spearman", "designs": used,
                     "note": "Spearman rank correlation of each parameter with the critical gain "
                             "over the sampled variants (valid for monotone effects); infinite "
                             "critical gains rank highest, variants unstable at the reference gain "
                             "rank lowest"}
    if levelled.sum() >= 2:
        used = _present(design, levelled, LEVEL_DESIGNS)
        y = crit[levelled].copy()
        uns = unstable[levelled]
        finite = y[np.isfinite(y)]
        cap = float(finite.max()) if finite.size else k_ref
        y = np.where(uns, k_ref, y)  # no margin at all: the stable interval ends at or below k_ref
        y = np.where(np.isposinf(y), cap, y)
        ok = ~np.isnan(y)
        if np.unique(y[ok]).size < 2:
            return [], {"measure": None, "designs": used,
                        "note": "nothing to rank: " + _one_value(crit[levelled], unstable[levelled],
                                                                 "corners/grid variants")}
        out = []
        for n in names:
            x = np.asarray(ds[n].values, float)[levelled]
            hi = ok & np.isclose(x, x.max())
            lo = ok & np.isclose(x, x.min())
            effect = float(y[hi].mean() - y[lo].mean()) if hi.any() and lo.any() else 0.0
            entry = {"parameter": n, "score": effect, "measure": "main effect"}
            if nominal_crit is not None and math.isfinite(nominal_crit) and nominal_crit > 0:
                entry["relative"] = effect / nominal_crit
            out.append(entry)
        out.sort(key=lambda d: -abs(d["score"]))
        return out, {"measure": "main effect", "designs": used,
                     "note": "mean critical gain at the high level minus at the low level, in gain "
                             "units ('relative': over the nominal critical gain); valid because "
                             "corners and full grids are balanced, every level of one parameter "
                             "meets the same levels of the others; infinite critical gains are "
                             "capped at the largest finite one, variants unstable at the reference "
                             "gain count as the reference gain"}
    return [], {"measure": None, "designs": [],
                "note": f"needs a random, lhs or sobol design (>= {MIN_SAMPLES_FOR_RANKS} "
                        "variants) or corners/grid"}


# (variable, which end is worst) for the operating-gain summary
_OPERATING = (("gain_margin", "min"), ("min_damping", "min"), ("lower_gain_margin", "max"))


def _operating(ds: xr.Dataset, unstable: np.ndarray, basis: np.ndarray) -> dict | None:
    k0 = operating_gain(ds)
    out: dict[str, Any] = {"gain": k0}
    any_data = False
    variants = np.asarray(ds["variant"].values)
    design = _design_of(ds)
    for name, worst_end in _OPERATING:
        if name not in ds:
            out[name] = None
            continue
        v = np.asarray(ds[name].values, float)
        have = ~np.isnan(v)
        if name == "lower_gain_margin":
            # only informative for conditionally stable loops (an interval starting above 0)
            if not np.any(have & (v > 0)):
                out[name] = None
                continue
        elif not have.any():
            out[name] = None
            continue
        any_data = True
        cand = np.flatnonzero(have)
        i = int(cand[np.argmin(v[have])] if worst_end == "min" else cand[np.argmax(v[have])])
        worst = {"variant": int(variants[i]), "design": str(design[i]), "value": float(v[i])}
        if name == "gain_margin":
            worst["db"] = 20.0 * math.log10(v[i]) if v[i] > 0 else -math.inf
        # no value (unstable at the operating gain): ranked at the bad end
        missing = unstable & ~have
        if worst_end == "min":
            qs = _ranked_stats(np.where(missing, np.nan, v)[basis], missing[basis])
        else:  # lower gain margin: plain quantiles of the variants that have one
            qs = {q: ranked_quantile(v[basis & have], float(q)) for q in QUANTILES}
        out[name] = {"worst": worst, "quantiles": qs, "without_value": int((~have).sum())}
    if "min_damping" in ds and out.get("min_damping"):
        out["min_damping"]["note"] = ("damping ratio -Re(p)/|p| of the least damped closed-loop "
                                      "pole; negative when a pole is in the right half plane")
    return out if any_data else None


def _flags(ds: xr.Dataset) -> dict[str, int]:
    """Counts of the per-variant warning flags the analysis stores."""
    out = {}
    for name, bad in (("ill_conditioned", 1), ("routh_agrees", 0), ("fixed_axis_root", 1)):
        if name in ds:
            v = np.asarray(ds[name].values)
            out["routh_disagrees" if name == "routh_agrees" else name] = int(np.sum(v == bad))
    return out


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
        Plain Python values only (``float('inf')`` and ``float('nan')``
        included; `sweep.jsonutil` writes them as ``"inf"`` and ``null``):

        - ``n_variants``, ``reference_gain``, ``feedback``, ``gain_range``
          (``[low, high]`` from the stored config, or None);
        - ``worst`` {``variant``, ``design``, ``critical_gain``,
          ``critical_gain_low``, ``crossing_frequency``, ``parameters``,
          ``basis``, ``max_real_part``, ``closed_loop_poles``}: the smallest
          critical gain over every variant, or, when some variant is unstable
          at the reference gain, the one whose roots there reach furthest right
          (``critical_gain`` NaN; ``basis`` says where those roots came from);
          ``closed_loop_poles``: complex, at the operating gain, or None;
        - ``nominal`` {``variant``, ``critical_gain``, ``critical_gain_low``,
          ``crossing_frequency``, ``closed_loop_poles``} or None;
        - ``robust_gain_interval`` ``[max critical_gain_low, min
          critical_gain]`` (stable for every variant and holding the reference
          gain) or None, with ``robust_gain_interval_variants`` (the variants
          setting the lower and upper end; the lower is None when every
          interval starts at the same gain) and ``robust_gain_interval_note``;
        - ``unstable_at_reference``; ``infinite`` (count of ``inf`` critical
          gains); ``not_computed`` (stable at the reference gain but NaN,
          flagged ill-conditioned; left out of the quantiles);
        - ``quantiles`` of the critical gain over ``quantile_basis`` (see
          `quantile_basis`; numpy's linear rule; a position among infinite
          values gives ``inf``; a position touching a variant unstable at the
          reference gain, which ranks lowest, gives NaN) and ``quantile_note``;
        - ``sensitivity`` (list of {``parameter``, ``score``, ``measure``},
          largest ``|score|`` first) and ``sensitivity_method`` {``measure``,
          ``designs``, ``note``};
        - ``operating``: at the operating gain, worst and quantiles of
          ``gain_margin`` (with ``db``), ``min_damping`` and, for conditionally
          stable loops, ``lower_gain_margin`` (worst = largest); or None;
        - ``flags``: counts of ``ill_conditioned``, ``routh_disagrees`` and
          ``fixed_axis_root`` variants;
        - ``certified`` {``lower``, ``upper``, ``method``, ``exact``, ``status``} or None.

    Raises
    ------
    InputError
        When the dataset lacks the variables a result file always has.

    Examples
    --------
    >>> import sweep
    >>> ds = sweep.open_result("results/conveyor.nc")  # doctest: +SKIP
    >>> sweep.summarize(ds)["worst"]["critical_gain"]  # doctest: +SKIP
    """
    _require(ds, ("critical_gain", "critical_gain_low", "crossing_frequency", "design"))
    crit = np.asarray(ds["critical_gain"].values, float)
    low = np.asarray(ds["critical_gain_low"].values, float)
    freq = np.asarray(ds["crossing_frequency"].values, float)
    design = _design_of(ds)
    variants = np.asarray(ds["variant"].values)
    V = crit.size
    k_ref = reference_gain(ds)
    if "stable_at_reference" in ds:
        unstable = np.asarray(ds["stable_at_reference"].values) == 0
    else:
        unstable = np.isnan(crit)
    n_unstable = int(unstable.sum())

    gr = gain_range(ds)
    out: dict[str, Any] = {"n_variants": int(V), "reference_gain": float(k_ref),
                           "feedback": str(ds.attrs.get("feedback", "negative")),
                           "gain_range": None if gr is None else list(gr)}
    if V == 0:
        out.update(worst=None, nominal=None, robust_gain_interval=None,
                   robust_gain_interval_variants=None, robust_gain_interval_note="no variants",
                   unstable_at_reference=0, infinite=0, not_computed=0,
                   quantiles={q: math.nan for q in QUANTILES},
                   quantile_basis={"designs": [], "variants": 0, "note": "no variants"},
                   quantile_note="", sensitivity=[],
                   sensitivity_method={"measure": None, "designs": [], "note": "no variants"},
                   operating=None, flags={}, certified=_certified(ds, certificate))
        return out

    not_computed = ~unstable & np.isnan(crit)
    if n_unstable:
        i, reach, basis = _worst_unstable(ds, unstable, k_ref)
        worst_crit = worst_low = worst_freq = math.nan
    else:
        usable = ~np.isnan(crit)
        if not usable.any():
            raise InputError("every critical gain is NaN although every variant is stable at the "
                             "reference gain; the result is damaged, rerun 'sweep run'",
                             field="critical_gain")
        cand = np.flatnonzero(usable)
        i = int(cand[np.argmin(crit[usable])])
        reach = math.nan
        basis = "smallest critical gain"
        if not_computed.any():
            basis += f" among the {int(usable.sum())} variants with a computed one"
        worst_crit, worst_low, worst_freq = float(crit[i]), float(low[i]), float(freq[i])
    out["worst"] = {
        "variant": int(variants[i]), "design": str(design[i]),
        "critical_gain": worst_crit, "critical_gain_low": worst_low,
        "crossing_frequency": worst_freq,
        "parameters": _parameters_of(ds, i), "basis": basis, "max_real_part": reach,
        "closed_loop_poles": _closed_loop_poles(ds, i),
    }

    nom = np.flatnonzero(design == "nominal")
    out["nominal"] = (None if nom.size == 0 else
                      {"variant": int(variants[nom[0]]), "critical_gain": float(crit[nom[0]]),
                       "critical_gain_low": float(low[nom[0]]),
                       "crossing_frequency": float(freq[nom[0]]),
                       "closed_loop_poles": _closed_loop_poles(ds, int(nom[0]))})

    out["robust_gain_interval"] = None
    out["robust_gain_interval_variants"] = None
    if n_unstable:
        out["robust_gain_interval_note"] = (f"{n_unstable} variant(s) unstable at the reference "
                                            "gain: no interval holding it is stable for all")
    elif not_computed.any():
        out["robust_gain_interval_note"] = (f"{int(not_computed.sum())} variant(s) have no computed "
                                            "critical gain (ill-conditioned): stability for all "
                                            "cannot be claimed")
    else:
        lo_i, hi_i = float(np.max(low)), float(np.min(crit))
        if lo_i < hi_i:
            out["robust_gain_interval"] = [lo_i, hi_i]
            lo_v = None if np.all(low == low[0]) else int(variants[int(np.argmax(low))])
            out["robust_gain_interval_variants"] = [lo_v, int(variants[int(np.argmin(crit))])]
            out["robust_gain_interval_note"] = "stable for every variant of the sweep"
        else:
            out["robust_gain_interval_note"] = "the variants' stable intervals do not overlap"
    out["unstable_at_reference"] = n_unstable
    out["infinite"] = int(np.isposinf(crit).sum())
    # stable at the reference gain but no number (flagged ill-conditioned): left out of quantiles
    out["not_computed"] = int(not_computed.sum())
    qmask, qbasis = quantile_basis(ds)
    out["quantiles"] = _ranked_stats(np.where(unstable, np.nan, crit)[qmask], unstable[qmask])
    out["quantile_basis"] = qbasis
    out["quantile_note"] = ("variants unstable at the reference gain rank lowest; a quantile that "
                            "falls on them is null") if unstable[qmask].any() else ""
    nominal_crit = None if out["nominal"] is None else out["nominal"]["critical_gain"]
    out["sensitivity"], out["sensitivity_method"] = _sensitivity(ds, crit, unstable, k_ref,
                                                                nominal_crit)
    out["operating"] = _operating(ds, unstable, qmask)
    out["flags"] = _flags(ds)
    out["certified"] = _certified(ds, certificate)
    return out


def worst_variants(ds: xr.Dataset, count: int = 10) -> xr.Dataset:
    """The ``count`` worst variants as a small dataset, worst first (for notebooks).

    Order: variants unstable at the reference gain first (those whose
    closed-loop roots reach furthest right first, when stored), then by
    critical gain, smallest first; variants without a computed critical gain
    last.

    Parameters
    ----------
    ds
        A result dataset.
    count
        How many to return (fewer when the sweep has fewer).

    Returns
    -------
    xarray.Dataset
        The per-variant variables (``critical_gain``, ``critical_gain_low``,
        ``crossing_frequency``, ``stable_at_reference`` and, when present,
        ``gain_margin``, ``min_damping``) with the parameter and ``design``
        coordinates, along ``variant``.
    """
    _require(ds, ("critical_gain", "design"))
    crit = np.asarray(ds["critical_gain"].values, float)
    unstable = (np.asarray(ds["stable_at_reference"].values) == 0 if "stable_at_reference" in ds
                else np.isnan(crit))
    reach = np.zeros(crit.size)
    if "closed_loop_pole_real" in ds:
        re = np.asarray(ds["closed_loop_pole_real"].values, float)
        with np.errstate(all="ignore"):
            r = np.where(np.isfinite(re).any(axis=1), np.nanmax(np.where(np.isfinite(re), re, -np.inf),
                                                                axis=1), 0.0)
        reach = np.where(unstable, r, 0.0)
    group = np.where(unstable, 0, np.where(np.isnan(crit), 2, 1))
    key2 = np.where(unstable, -reach, np.nan_to_num(crit, nan=np.inf))
    order = np.lexsort((np.arange(crit.size), key2, group))[: max(int(count), 0)]
    names = [n for n in ("critical_gain", "critical_gain_low", "crossing_frequency",
                         "stable_at_reference", "gain_margin", "min_damping") if n in ds]
    return ds[names].isel(variant=order).load()


# how a stored certificate's bracket reads, by its status (see sweep.certify)
_CERT_KIND = {
    "certified": "guaranteed bounds",
    "budget": "guaranteed bounds, tolerance not reached",
    "stalled": "guaranteed bounds, tolerance not reached",
    "reference_unproven": "not proven: stability at the reference gain could not be shown",
    "degree_invariance_fails": "undefined: the degree drops inside the box",
    "unstable_at_reference": "some variant is unstable at the reference gain",
}


def _certified(ds: xr.Dataset, certificate: dict | None) -> dict | None:
    if certificate is not None:
        return {"lower": _f(certificate.get("lower")), "upper": _f(certificate.get("upper")),
                "method": certificate.get("method"), "exact": bool(certificate.get("exact", False)),
                "status": certificate.get("status")}
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
    feedback = summary.get("feedback", "negative")
    rows: list[tuple[str, str]] = [
        ("variants", f"{summary['n_variants']}  ({_design_counts(ds)})"),
        ("feedback", feedback),
        ("reference gain", _num(summary["reference_gain"])
         + ("" if summary.get("operating") else "  (no operating gain: the lower end of the gain range)")),
        ("unstable at reference gain", str(summary["unstable_at_reference"])),
        ("infinite critical gains", str(summary.get("infinite", 0))
         + ("  (never lose stability in the gain range)" if summary.get("infinite") else "")),
    ]
    if summary.get("not_computed"):
        rows.append(("not computed (ill-conditioned)", str(summary["not_computed"])))
    nom = summary.get("nominal")
    if nom:
        rows.append(("nominal critical gain", _num(nom["critical_gain"])))
        rows.append(("nominal crossing frequency", _freq(nom["crossing_frequency"])))
    rgi = summary.get("robust_gain_interval")
    if rgi:
        who = summary.get("robust_gain_interval_variants") or [None, None]
        ends = [f"upper end: variant {who[1]}"]
        if who[0] is not None:
            ends.insert(0, f"lower end: variant {who[0]}")
        rows.append(("robust gain interval", f"({_num(rgi[0])}, {_num(rgi[1])})  ({'; '.join(ends)})"))
    else:
        rows.append(("robust gain interval", "none: " + summary.get("robust_gain_interval_note",
                                                                    "no common stable interval")))
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
            if w.get("critical_gain_low") not in (None, 0.0) and _num(w.get("critical_gain_low")) != "-":
                gr = summary.get("gain_range")
                at_start = gr is not None and w["critical_gain_low"] == gr[0]
                wrows.append(("stable from gain", _num(w["critical_gain_low"])
                              + ("  (the start of the gain range)" if at_start else "")))
            wrows.append(("crossing frequency", _freq(w["crossing_frequency"])))
            if w.get("basis", "").startswith("smallest critical gain among"):
                wrows.append(("chosen by", w["basis"]))
        if w.get("closed_loop_poles") and summary.get("operating"):
            wrows.append(("closed-loop poles at the operating gain", _poles(w["closed_loop_poles"])))
        cert = summary.get("certified")
        if cert:
            kind = _CERT_KIND.get(cert.get("status"), "guaranteed bounds")
            if cert.get("exact"):
                kind = "exact"
            if _num(cert["lower"]) == "-" and _num(cert["upper"]) == "-":
                bracket = f"none ({cert.get('method')}: {kind})"
            else:
                bracket = f"[{_num(cert['lower'])}, {_num(cert['upper'])}] ({cert.get('method')}, {kind})"
            wrows.append(("certified worst case", bracket))
        lines += _table(wrows, indent=2)
        lines.append("  parameters:")
        prow = []
        for n, v in w["parameters"].items():
            u = _units(ds, n)
            prow.append((n, f"{_num(v)} {u}".rstrip()))
        lines += _table(prow, indent=4) if prow else ["    (none: the config has no parameters)"]
    q = summary.get("quantiles") or {}
    qb = summary.get("quantile_basis") or {}
    over = (f" over {qb.get('variants')} variant{'' if qb.get('variants') == 1 else 's'} "
            f"({', '.join(qb.get('designs', []))})"
            if qb.get("designs") else "")
    lines += ["", f"Critical gain quantiles{over}:"]
    lines += _table([(f"q {k}", _num(v)) for k, v in q.items()], indent=2)
    if qb.get("note"):
        lines.append("  (" + qb["note"] + ")")
    if summary.get("quantile_note"):
        lines.append("  (" + summary["quantile_note"] + ")")
    sens = summary.get("sensitivity") or []
    meth = summary.get("sensitivity_method") or {}
    if sens:
        label = ("Spearman rank correlation" if meth.get("measure") == "spearman"
                 else "main effect, gain units" if meth.get("measure") == "main effect"
                 else str(meth.get("measure")))
        lines += ["", f"Sensitivity of the critical gain ({label}; designs: "
                      f"{', '.join(meth.get('designs', []))}):"]
        srows = []
        for d in sens:
            val = f"{d['score']:+.3f}" if d["measure"] == "spearman" else f"{d['score']:+.4g}"
            if "relative" in d:
                val += f"  ({d['relative']:+.1%} of nominal)"
            srows.append((d["parameter"], val))
        lines += _table(srows, indent=2)
    elif meth.get("note"):
        lines += ["", f"Sensitivity: {meth['note']}"]
    op = summary.get("operating")
    if op:
        lines += ["", f"At the operating gain {_num(op['gain'])}:"]
        orows = []
        for name, label in (("gain_margin", "gain margin"), ("lower_gain_margin", "lower gain margin"),
                            ("min_damping", "minimum damping ratio")):
            d = op.get(name)
            if not d:
                continue
            wv = d["worst"]
            qs = "  ".join(f"{k}: {_num(v)}" for k, v in d["quantiles"].items())
            extra = (f"; {d['without_value']} variants have no value (unstable)"
                     if d["without_value"] else "")
            db = f" ({_num(wv['db'])} dB)" if "db" in wv else ""
            orows += [(label + ", worst", f"{_num(wv['value'])}{db} (variant {wv['variant']}, "
                                          f"{wv['design']}{extra})"),
                      (label + ", quantiles", qs)]
        lines += _table(orows, indent=2)
    flags = {k: v for k, v in (summary.get("flags") or {}).items() if v}
    if flags:
        text = {"ill_conditioned": "ill-conditioned (numbers not to full precision)",
                "routh_disagrees": "Routh count disagrees with the eigenvalues",
                "fixed_axis_root": "a root fixed on the imaginary axis (common factor)"}
        lines += ["", "Flagged variants:"]
        lines += _table([(text.get(k, k), str(v)) for k, v in flags.items()], indent=2)
    return "\n".join(lines)


def _poles(poles: list[complex]) -> str:
    """Poles as text, slowest first, a conjugate pair once as ``a ± bj`` (real polynomials)."""
    items = []
    for p in sorted(poles, key=lambda z: (-z.real, abs(z.imag))):
        tiny = 1e-12 * max(1.0, abs(p))
        if p.imag > tiny:
            items.append(f"{_num(p.real)} ± {_num(p.imag)}j")
        elif p.imag >= -tiny:
            items.append(_num(p.real))
    return ", ".join(items)


def _freq(w: Any) -> str:
    s = _num(w)
    if s == "0":
        return "0 rad/s (a real root through the origin)"
    if s == "inf":
        return "inf (a root through infinity)"
    return s if s == "-" else f"{s} rad/s"


def _design_counts(ds: xr.Dataset) -> str:
    design = _design_of(ds)
    order = ("nominal",) + LEVEL_DESIGNS + SAMPLED_DESIGNS
    names = _present(design, np.ones(design.size, bool), order)
    return ", ".join(f"{n} {int((design == n).sum())}" for n in names)


def _table(rows: list[tuple[str, str]], indent: int = 0) -> list[str]:
    if not rows:
        return []
    width = max(len(a) for a, _ in rows)
    return [" " * indent + f"{a:<{width}}  {b}" for a, b in rows]
