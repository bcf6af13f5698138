"""Synthetic result datasets for the query and plot tests (a helper, not a test file).

The loop is a small, real one whose critical gains are known in closed form: a
winch drum position loop, motor plus drum, with a rate (tacho) path in the
sensor,

    L(s) = k * Kt * (Tr s + 1) / (s (J s + B) (L s + R)),

so ``D = a3 s^3 + a2 s^2 + a1 s + a0`` with ``a3 = J L``, ``a2 = J R + B L``,
``a1 = B R``, ``a0 = 0`` and ``N = b1 s + b0`` with ``b1 = Kt Tr``,
``b0 = Kt``.  Negative feedback, ``gain_range = [0, inf]``.

Routh–Hurwitz criterion for cubics (from memory): ``c3 s^3 + c2 s^2 + c1 s + c0``
with ``c3 > 0`` is stable iff ``c2, c1, c0 > 0`` and ``c2 c1 > c3 c0``.  With
``c1 = a1 + k b1`` and ``c0 = a0 + k b0`` the last condition is
``k (a3 b0 - a2 b1) < a2 a1 - a3 a0``.  So for ``a3 b0 > a2 b1`` the critical
gain is ``(a2 a1 - a3 a0) / (a3 b0 - a2 b1)`` (``= (a2 a1 - a3 a0)/(a3 b0)``
without the rate path), else stability is never lost (``inf``).  At the
critical gain the Routh row of ``s^1`` vanishes and the auxiliary polynomial
``c2 s^2 + c0`` gives the crossing ``w^2 = c0 / c2 = c1 / c3``.

Everything is computed per variant with numpy (``numpy.roots`` loops are fine
in a test helper).
"""
from __future__ import annotations

import hashlib
import itertools
from typing import Sequence

import numpy as np
import xarray as xr

# name: (nominal, low, high, units); Tr is the rate-feedback time constant.
PARAMETERS: dict[str, tuple[float, float, float, str]] = {
    "J": (4.0e-4, 3.4e-4, 4.6e-4, "kg m^2"),
    "L": (3.0e-3, 2.5e-3, 3.6e-3, "H"),
    "Tr": (5.0e-4, 2.5e-4, 1.0e-3, "s"),
    "R": (1.2, 1.2, 1.2, "ohm"),
    "B": (1.0e-3, 1.0e-3, 1.0e-3, "N m s"),
    "Kt": (0.05, 0.05, 0.05, "N m/A"),
}
UNCERTAIN = ("J", "L", "Tr")


def polynomials(values: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator stacks ``(V, 2)`` and ``(V, 4)``, highest power first."""
    J, L, Tr, R, B, Kt = (np.asarray(values[n], float) for n in ("J", "L", "Tr", "R", "B", "Kt"))
    a3, a2, a1, a0 = J * L, J * R + B * L, B * R, np.zeros_like(J)
    N = np.stack([Kt * Tr, Kt], axis=1)
    D = np.stack([a3, a2, a1, a0], axis=1)
    return N, D


def closed_form(N: np.ndarray, D: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Critical gain and crossing frequency from the cubic Routh criterion (from memory)."""
    a3, a2, a1, a0 = D.T
    b1, b0 = N.T
    den = a3 * b0 - a2 * b1
    num = a2 * a1 - a3 * a0
    with np.errstate(divide="ignore", invalid="ignore"):
        kc = np.where(den > 0, num / den, np.inf)
        w = np.where(np.isfinite(kc), np.sqrt((a1 + kc * b1) / a3), np.nan)
    return kc, w


def char_roots(N: np.ndarray, D: np.ndarray, k: float) -> np.ndarray:
    """Roots of ``D + k N`` for one variant (1-D coefficient arrays)."""
    P = D.astype(float).copy()
    P[-N.size:] += k * N
    return np.roots(P)


def _designs(designs: Sequence[str], samples: int, levels: int, seed: int,
             ranges: dict[str, tuple[float, float, float, str]]):
    rng = np.random.default_rng(seed)
    rows: list[dict[str, float]] = []
    labels: list[str] = []
    for d in designs:
        if d == "nominal":
            pts = [{n: ranges[n][0] for n in UNCERTAIN}]
        elif d == "corners":
            pts = [dict(zip(UNCERTAIN, [ranges[n][1 + b] for n, b in zip(UNCERTAIN, bits)]))
                   for bits in itertools.product((0, 1), repeat=len(UNCERTAIN))]
        elif d == "grid":
            axes = [np.linspace(ranges[n][1], ranges[n][2], levels) for n in UNCERTAIN]
            pts = [dict(zip(UNCERTAIN, combo)) for combo in itertools.product(*axes)]
        elif d in ("random", "lhs", "sobol"):
            u = rng.random((samples, len(UNCERTAIN)))
            pts = [{n: ranges[n][1] + u[i, j] * (ranges[n][2] - ranges[n][1])
                    for j, n in enumerate(UNCERTAIN)} for i in range(samples)]
        else:
            raise ValueError(d)
        rows += pts
        labels += [d] * len(pts)
    values = {n: np.array([r[n] for r in rows]) for n in UNCERTAIN}
    V = len(rows)
    for n, (nom, _lo, _hi, _u) in ranges.items():
        if n not in UNCERTAIN:
            values[n] = np.full(V, nom)
    return values, np.array(labels)


def _match(prev: np.ndarray, cur: np.ndarray) -> np.ndarray:
    """Reorder ``cur`` (V, n) to continue ``prev`` (V, n): best of all permutations."""
    n = prev.shape[1]
    perms = np.array(list(itertools.permutations(range(n))))
    cost = np.abs(cur[:, perms] - prev[:, None, :]).sum(axis=2)  # (V, P)
    best = perms[np.argmin(cost, axis=1)]
    return np.take_along_axis(cur, best, axis=1)


def make_dataset(
    *,
    designs: Sequence[str] = ("nominal", "corners", "random"),
    samples: int = 40,
    levels: int = 3,
    seed: int = 1,
    operating_gain: float | None = None,
    with_operating_quantities: bool = True,
    rate_range: tuple[float, float, float] | None = None,
    points: int = 80,
    keep: str = "all",
    title: str = "Winch drum position loop",
) -> xr.Dataset:
    """Build a result dataset with the DESIGN section 4 schema for the winch loop.

    Parameters
    ----------
    designs, samples, levels, seed
        Which designs make the variants (``nominal`` first gives variant 0 the nominal).
    operating_gain
        The reference gain; ``None`` uses the lower end of the gain range (0+).
        Pick one inside the spread of critical gains to get variants that are
        unstable at the reference gain.
    with_operating_quantities
        When False, the margin variables (``gain_margin``, ``min_damping``, ...)
        are left out of the dataset altogether.
    rate_range
        ``(nominal, low, high)`` of ``Tr``.  ``Tr >= J L / (J R + B L)`` (about
        2.1e-3 to 2.9e-3 s over the box; never reached by the default range) makes
        the critical gain ``inf``; ``(2e-3, 1e-3, 4e-3)`` gives a mix of finite
        and infinite critical gains.
    points
        Gains on the locus grid.
    keep
        ``"all"``, ``"corners"`` (nominal and corners) or ``"none"``: which loci are stored.
    """
    ranges = dict(PARAMETERS)
    if rate_range is not None:
        ranges["Tr"] = (*rate_range, "s")
    values, labels = _designs(designs, samples, levels, seed, ranges)
    V = labels.size
    N, D = polynomials(values)
    kc, w = closed_form(N, D)
    k_ref = 0.0 if operating_gain is None else float(operating_gain)
    stable_ref = (kc > k_ref) if operating_gain is not None else np.ones(V, bool)
    crit = np.where(stable_ref, kc, np.nan)
    crit_low = np.where(stable_ref, 0.0, np.nan)
    wc = np.where(stable_ref, w, np.nan)

    # boundary: only k_crit lies strictly inside (0, inf) (the origin root is at k = 0)
    bgain = np.where(np.isfinite(kc), kc, np.nan)[:, None]
    bfreq = np.where(np.isfinite(kc), w, np.nan)[:, None]
    babove = np.where(np.isfinite(kc), 0, -1).astype(np.int8)[:, None]

    poles = np.array([np.sort_complex(np.roots(d)) for d in D])  # (V, 3)
    zeros = (-N[:, 1] / N[:, 0])[:, None].astype(complex)
    centroid = (poles.real.sum(1) - zeros.real.sum(1)) / 2.0
    # breakaway: real roots of N D' - N' D with k = -D/N real and > 0
    bk_pts = np.full((V, 3), np.nan)
    bk_gain = np.full((V, 3), np.nan)
    for v in range(V):
        eq = np.polysub(np.polymul(N[v], np.polyder(D[v])), np.polymul(np.polyder(N[v]), D[v]))
        r = np.roots(eq)
        r = r[np.abs(r.imag) < 1e-9 * (1 + np.abs(r.real))].real
        k = -np.polyval(D[v], r) / np.polyval(N[v], r)
        ok = np.isfinite(k) & (k > 0)
        r, k = r[ok], k[ok]
        order = np.argsort(k)
        bk_pts[v, : r.size] = r[order]
        bk_gain[v, : r.size] = k[order]

    # common gain grid: log spaced, with the nominal's boundary gain and the operating gain on it
    finite = kc[np.isfinite(kc)]
    top = (finite.max() if finite.size else 100.0) * 30
    grid = np.geomspace(top / 1e5, top, points)
    specials = [kc[0]] if np.isfinite(kc[0]) else []
    if operating_gain is not None:
        specials.append(k_ref)
    for g in specials:
        grid[np.argmin(np.abs(np.log(grid) - np.log(g)))] = g
    grid = np.unique(grid)
    G = grid.size

    # roots of every variant on the grid (for the envelope), branches matched gain to gain
    roots = np.empty((V, G, 3), complex)
    for gi, g in enumerate(grid):
        P = D.copy()
        P[:, 2:] += g * N
        comp = np.zeros((V, 3, 3))
        comp[:, 0, :] = -P[:, 1:] / P[:, :1]
        comp[:, 1, 0] = comp[:, 2, 1] = 1.0
        cur = np.linalg.eigvals(comp)
        roots[:, gi] = cur if gi == 0 else _match(roots[:, gi - 1], cur)
    absc = roots.real.max(axis=2)

    if keep == "all":
        kept = np.arange(V)
    elif keep == "corners":
        kept = np.flatnonzero(np.isin(labels, ["nominal", "corners"]))
    else:
        kept = np.arange(0)

    ds = xr.Dataset(coords={"variant": np.arange(V), "gain": grid,
                            "design": ("variant", labels.astype(str))})
    ds["gain"].attrs.update(long_name="loop gain k", units="1")
    ds["design"].attrs.update(long_name="design", units="")
    for n, (_nom, _lo, _hi, unit) in ranges.items():
        ds.coords[n] = ("variant", values[n], {"long_name": n, "units": unit})

    def put(name, dims, data, long_name, units):
        ds[name] = (dims, data, {"long_name": long_name, "units": units})

    put("critical_gain", "variant", crit, "critical gain", "1")
    put("critical_gain_low", "variant", crit_low, "lower end of the stable interval", "1")
    put("crossing_frequency", "variant", wc, "crossing frequency at the critical gain", "rad/s")
    put("stable_at_reference", "variant", stable_ref.astype(np.int8), "stable at the reference gain", "1")
    put("stable_at_start", "variant", np.ones(V, np.int8), "stable just above the range start", "1")
    put("asymptote_centroid", "variant", centroid, "asymptote centroid", "1/s")
    put("boundary_gain", ("variant", "boundary"), bgain, "boundary gain", "1")
    put("boundary_frequency", ("variant", "boundary"), bfreq, "boundary frequency", "rad/s")
    put("stable_above", ("variant", "boundary"), babove, "stable just above the boundary gain", "1")
    put("open_loop_pole_real", ("variant", "pole"), poles.real, "open-loop pole, real part", "1/s")
    put("open_loop_pole_imag", ("variant", "pole"), poles.imag, "open-loop pole, imaginary part", "rad/s")
    put("open_loop_zero_real", ("variant", "zero"), zeros.real, "open-loop zero, real part", "1/s")
    put("open_loop_zero_imag", ("variant", "zero"), zeros.imag, "open-loop zero, imaginary part", "rad/s")
    put("departure_angle", ("variant", "pole"), np.full((V, 3), np.nan), "departure angle", "degree")
    put("arrival_angle", ("variant", "zero"), np.full((V, 1), np.nan), "arrival angle", "degree")
    put("breakaway_point", ("variant", "breakaway"), bk_pts, "breakaway point", "1/s")
    put("breakaway_gain", ("variant", "breakaway"), bk_gain, "gain at the breakaway point", "1")

    if with_operating_quantities:
        if operating_gain is None:
            nanv = np.full(V, np.nan)
            cl = np.full((V, 3), np.nan)
            gm = gmdb = lgm = zeta = dom = nanv
            cli = cl
        else:
            clr = np.array([char_roots(N[v], D[v], k_ref) for v in range(V)])
            cl, cli = clr.real, clr.imag
            with np.errstate(divide="ignore", invalid="ignore"):
                gm = np.where(stable_ref, kc / k_ref, np.nan)
                gmdb = 20 * np.log10(gm)
                lgm = np.where(stable_ref, 0.0, np.nan)
                zeta = (-clr.real / np.abs(clr)).min(axis=1)
                re = np.sort(np.abs(clr.real), axis=1)
                # next-slowest distinct real part over the slowest (a pair counts once)
                nxt = np.where(np.isclose(re[:, 1], re[:, 0]), re[:, 2], re[:, 1])
                dom = nxt / re[:, 0]
        put("gain_margin", "variant", gm, "upper gain margin", "1")
        put("gain_margin_db", "variant", gmdb, "upper gain margin", "dB")
        put("lower_gain_margin", "variant", lgm, "lower gain margin", "1")
        put("min_damping", "variant", zeta, "minimum damping ratio", "1")
        put("dominance_ratio", "variant", dom, "dominance ratio", "1")
        put("closed_loop_pole_real", ("variant", "pole"), cl, "closed-loop pole, real part", "1/s")
        put("closed_loop_pole_imag", ("variant", "pole"), cli, "closed-loop pole, imaginary part", "rad/s")

    ds.coords["locus_variant"] = ("locus_variant", kept)
    ds["locus_variant"].attrs.update(long_name="variant of each stored locus", units="1")
    put("locus_real", ("locus_variant", "gain", "branch"), roots[kept].real.astype(np.float32),
        "closed-loop root, real part", "1/s")
    put("locus_imag", ("locus_variant", "gain", "branch"), roots[kept].imag.astype(np.float32),
        "closed-loop root, imaginary part", "rad/s")
    put("abscissa_min", "gain", absc.min(0), "spectral abscissa, minimum over variants", "1/s")
    put("abscissa_max", "gain", absc.max(0), "spectral abscissa, maximum over variants", "1/s")
    put("abscissa_mean", "gain", absc.mean(0), "spectral abscissa, mean over variants", "1/s")

    toml = _config_text(title, ranges, designs, samples, levels, seed, operating_gain, points)
    ds.attrs.update(
        title=title, config=toml, config_sha256=hashlib.sha256(toml.encode()).hexdigest(),
        seed=seed, designs=",".join(designs), feedback="negative",
        created="2026-01-01T00:00:00+00:00", sweep_version="test",
        reference_gain=k_ref,
    )
    if operating_gain is not None:
        ds.attrs["operating_gain"] = k_ref
    return ds


def _config_text(title, ranges, designs, samples, levels, seed, operating_gain, points) -> str:
    lines = [f'title = "{title}"', "", "[parameters]"]
    for n, (nom, lo, hi, unit) in ranges.items():
        if lo == hi:
            lines.append(f'{n} = {{ nominal = {nom!r}, dist = "fixed", units = "{unit}" }}')
        else:
            lines.append(f'{n} = {{ nominal = {nom!r}, low = {lo!r}, high = {hi!r}, units = "{unit}" }}')
    lines += ["", "[plant]", 'transfer = "Kt / (s*(J*s + B)*(L*s + R))"', "", "[loop]",
              'sensor = "Tr*s + 1"', 'feedback = "negative"', "gain_range = [0, inf]"]
    if operating_gain is not None:
        lines.append(f"operating_gain = {operating_gain!r}")
    lines += ["", "[sweep]", "designs = [" + ", ".join(f'"{d}"' for d in designs) + "]",
              f"samples = {samples}", f"levels = {levels}", f"seed = {seed}",
              "", "[locus]", f"points = {points}", 'keep = "all"', ""]
    return "\n".join(lines)
