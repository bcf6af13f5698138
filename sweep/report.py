"""What `sweep check` reports: the nominal analysis as a plain dict, and its text form.

Pure functions (no printing); the CLI prints what they return.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from .config import Config
from . import loop


def check_summary(config: Config) -> dict[str, Any]:
    """The ``check --json`` fields for the nominal variant of a config.

    Parameters
    ----------
    config
        A validated config.

    Returns
    -------
    dict
        ``valid``, ``numerator``, ``denominator``, the analysis fields of the
        nominal loop (DESIGN section 6) and ``estimated_run_seconds``.

    Raises
    ------
    InputError
        When the designs would make more than ``sweep.max_variants`` variants,
        or a parameter is named like a variable of the result file.
    """
    from . import designs, runner
    from .analysis import analyze

    # refuse here what `sweep run` would refuse (too many variants, a parameter
    # named like a dataset variable), so that a config that passes `check` also starts
    designs.total_count(config)
    runner.check_names(config)
    N, D = loop.assemble(config, config.nominal_values())
    result = analyze(
        N[0], D[0], feedback=config.feedback, gain_range=config.gain_range, operating_gain=config.operating_gain
    )
    summary: dict[str, Any] = {"valid": True, "title": config.title}
    summary.update(result.to_dict())
    summary["numerator"] = [float(c) for c in N[0]]
    summary["denominator"] = [float(c) for c in D[0]]
    summary["n_variants"] = _variant_count(config)
    summary["estimated_run_seconds"] = estimate_run_seconds(config)
    return summary


def _variant_count(config: Config) -> int | None:
    from . import designs

    try:
        return sum(int(designs.design_count(config, name)) for name in config.sweep.designs)
    except Exception:  # noqa: BLE001 - the count is informative only; run reports the real error
        return None


def estimate_run_seconds(config: Config) -> float | None:
    """Projected wall time of ``sweep run`` on this machine with all cores.

    Uses the throughput figures of `sweep.bench` (a short calibration the
    first time, cached for the process).
    """
    count = _variant_count(config)
    if count is None:
        return None
    try:
        from . import bench

        return float(bench.estimate_seconds(config, count))
    except Exception:  # noqa: BLE001 - an estimate must never break `check`
        return None


def _fmt(x: Any, digits: int = 6) -> str:
    if x is None:
        return "-"
    if isinstance(x, (complex, np.complexfloating)):
        if abs(x.imag) < 1e-12 * max(1.0, abs(x)):
            return _fmt(x.real, digits)
        return f"{x.real:.{digits}g} {'+' if x.imag >= 0 else '-'} {abs(x.imag):.{digits}g}j"
    if isinstance(x, (list, tuple)) and len(x) == 2 and all(isinstance(v, (int, float)) for v in x):
        return f"{_fmt(x[0], digits)} {'+' if x[1] >= 0 else '-'} {abs(x[1]):.{digits}g}j" if x[1] else _fmt(x[0], digits)
    if isinstance(x, (float, np.floating, int, np.integer)):
        f = float(x)
        if math.isnan(f):
            return "-"
        if math.isinf(f):
            return "inf" if f > 0 else "-inf"
        return f"{f:.{digits}g}"
    return str(x)


def poly_text(coefs: Any) -> str:
    """A polynomial in s as readable text, highest power first."""
    coefs = [float(c) for c in coefs]
    n = len(coefs) - 1
    terms = []
    for i, c in enumerate(coefs):
        if c == 0:
            continue
        power = n - i
        mag = abs(c)
        body = "" if (mag == 1 and power > 0) else f"{mag:.6g}"
        if power == 1:
            body += "s" if not body else "*s"
        elif power > 1:
            body += f"s^{power}" if not body else f"*s^{power}"
        sign = "-" if c < 0 else "+"
        terms.append((sign, body))
    if not terms:
        return "0"
    text = ("-" if terms[0][0] == "-" else "") + terms[0][1]
    for sign, body in terms[1:]:
        text += f" {sign} {body}"
    return text


def format_check(config: Config, summary: dict[str, Any]) -> str:
    """Readable text of `check_summary` for the terminal."""
    out: list[str] = []
    out.append(f"{config.title or config.stem}  ({config.source})")
    out.append("")
    out.append("Parameters" if config.parameters else "Parameters: none (every coefficient is a number; nothing varies)")
    rows = [("name", "nominal", "low", "high", "spread", "dist", "units")]
    for p in config.parameters:
        if p.uncertain:
            spread = f"-{(p.nominal - p.low) / abs(p.nominal) * 100:.3g}/+{(p.high - p.nominal) / abs(p.nominal) * 100:.3g} %" if p.nominal else ""
            rows.append((p.name, _fmt(p.nominal), _fmt(p.low), _fmt(p.high), spread, p.dist, p.units))
        else:
            rows.append((p.name, _fmt(p.nominal), "", "", "", "fixed", p.units))
    if config.parameters:
        out.extend(_table(rows))
    out.append("")
    out.append("Nominal open loop  L(s) = k N(s)/D(s), no cancellation")
    for label, num, den in loop.nominal_parts(config):
        if len(num) == 1 and len(den) == 1 and num[0] == den[0]:
            continue
        out.append(f"  {label:<10} ({poly_text(num)}) / ({poly_text(den)})")
    out.append(f"  N(s) = {poly_text(summary['numerator'])}")
    out.append(f"  D(s) = {poly_text(summary['denominator'])}")
    out.append(f"  feedback {config.feedback}, gain range ({_fmt(config.gain_range[0])}, {_fmt(config.gain_range[1])})")
    out.append(f"  poles  {', '.join(_fmt(p) for p in summary.get('open_loop_poles', [])) or '-'}")
    out.append(f"  zeros  {', '.join(_fmt(z) for z in summary.get('open_loop_zeros', [])) or '-'}")
    out.append("")
    out.append("Stability of the nominal loop")
    gains = summary.get("boundary_gains", [])
    freqs = summary.get("boundary_frequencies", [])
    if gains:
        out.append("  boundary gains (root on the imaginary axis):")
        for g, w in zip(gains, freqs):
            out.append(f"    k = {_fmt(g):>12}   at w = {_fmt(w)} rad/s")
    else:
        out.append("  no root crosses the imaginary axis inside the gain range")
    intervals = summary.get("stable_intervals", [])
    out.append("  stable for k in " + (", ".join(f"({_fmt(a)}, {_fmt(b)})" for a, b in intervals) if intervals else "no interval of the gain range"))
    out.append(f"  reference gain      {_fmt(summary.get('reference_gain'))}")
    if summary.get("stable_at_reference") is False:  # NaN critical gain: say why rather than print '-'
        out.append("  critical gain       -   (the nominal loop is unstable at the reference gain)")
    else:
        out.append(f"  critical gain       {_fmt(summary.get('critical_gain'))}   (lower end {_fmt(summary.get('critical_gain_low'))})")
    out.append(f"  crossing frequency  {_fmt(summary.get('crossing_frequency'))} rad/s")
    if summary.get("routh_agrees") is False:
        out.append("  WARNING: the Routh count disagrees with the interval classification; treat these figures with care")
    if summary.get("ill_conditioned"):
        out.append("  WARNING: the boundary computation is ill-conditioned; digits may be unreliable")
    out.append("")
    out.append("Root-locus sketch")
    asym = summary.get("asymptotes") or {}
    angles = asym.get("angles_deg") or []
    out.append(f"  asymptotes: centroid {_fmt(asym.get('centroid'))}, angles {', '.join(_fmt(a, 4) for a in angles) or '-'} deg")
    bps = summary.get("breakaway_points") or []
    out.append("  breakaway/break-in: " + ("; ".join(f"s = {_fmt(s)} at k = {_fmt(k)}" for s, k in bps) if bps else "none in range"))
    for key, label in (("departure_angles_deg", "departure"), ("arrival_angles_deg", "arrival")):
        items = summary.get(key) or []
        if items:
            out.append(f"  {label} angles: " + "; ".join(f"{_fmt(p)}: {_fmt(a, 4)} deg" for p, a in items))
    if config.operating_gain is not None:
        out.append("")
        out.append(f"At the operating gain k = {_fmt(config.operating_gain)}")
        out.append(f"  gain margin         {_fmt(summary.get('gain_margin'))}  ({_fmt(summary.get('gain_margin_db'), 4)} dB)")
        if summary.get("lower_gain_margin") is not None and not _isnan(summary.get("lower_gain_margin")):
            out.append(f"  lower gain margin   {_fmt(summary.get('lower_gain_margin'))}")
        out.append(f"  minimum damping     {_fmt(summary.get('min_damping'), 4)}")
        out.append(f"  dominance ratio     {_fmt(summary.get('dominance_ratio'), 4)}"
                   + ("  (second-order approximation reasonable: ratio >= 10, a rule of thumb)" if summary.get("second_order_ok") else ""))
        poles = summary.get("closed_loop_poles") or []
        if poles:
            out.append(f"  closed-loop poles   {', '.join(_fmt(p) for p in poles)}")
    out.append("")
    n = summary.get("n_variants")
    est = summary.get("estimated_run_seconds")
    out.append(f"Sweep: designs {', '.join(config.sweep.designs)}; {n if n is not None else '?'} variants"
               + (f"; estimated run time {_duration(est)} on all cores" if est is not None else ""))
    return "\n".join(out)


def _isnan(x: Any) -> bool:
    return isinstance(x, float) and math.isnan(x)


def _duration(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:.0f} s" if seconds >= 1 else "under a second"
    if seconds < 3600:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


def _table(rows: list[tuple[str, ...]]) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  " + "  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip() for r in rows]
