"""Synthetic result datasets for the query and plot tests (a helper, not a test file).

Every dataset follows the schema of DESIGN section 4 and is computed here with
plain numpy, independently of `sweep.analysis` and `sweep.locus`: boundary
gains from the real roots of ``Im[D(jw) N(-jw)]`` (METHODS, "Crossings of the
imaginary axis"), stability of each gain interval from ``numpy.roots`` at a
gain inside it, loci from companion-matrix eigenvalues matched gain to gain.

Three small loops, each with a closed form (from memory, cubic Routh–Hurwitz
criterion: ``c3 s^3 + c2 s^2 + c1 s + c0`` with ``c3 > 0`` is stable iff
``c2, c1, c0 > 0`` and ``c2 c1 > c3 c0``) that `closed_form` returns and the
tests compare with the numeric reference:

``winch`` (negative feedback)
    A winch drum position loop, motor plus drum, with a rate (tacho) path in
    the sensor: ``L = k Kt (Tr s + 1) / (s (J s + B)(L s + R))``.  With
    ``a3 = J L, a2 = J R + B L, a1 = B R, a0 = 0, b1 = Kt Tr, b0 = Kt`` the
    last Routh condition is ``k (a3 b0 - a2 b1) < a2 a1 - a3 a0``: for
    ``a3 b0 > a2 b1`` the critical gain is ``(a2 a1 - a3 a0) / (a3 b0 - a2 b1)``
    with ``w^2 = c1 / c3``, else stability is never lost (``inf``).
``lift`` (negative feedback, conditionally stable)
    A hoist platform with one unstable pole ``p``:
    ``L = k / ((s - p)(s + a)(s + b))``.  ``P = s^3 + (a+b-p) s^2 +
    (ab - pa - pb) s + (k - pab)``: stable for ``pab < k < pab + (a+b-p)(ab-pa-pb)``,
    the lower end through the origin, the upper end at ``w^2 = ab - pa - pb``.
``kiln`` (positive feedback)
    A kiln draught loop with three lags and the loop closed with a plus sign:
    ``P = (s+a)(s+b)(s+c) - k``: stable for ``0 < k < abc`` (a root through
    the origin, crossing frequency 0).

Everything is computed per variant with numpy (Python loops are fine in a
test helper).
"""
from __future__ import annotations

import hashlib
import itertools
from typing import Sequence

import numpy as np
import xarray as xr

# name: (nominal, low, high, units); low == high means fixed
FAMILIES: dict[str, dict] = {
    "winch": {
        "title": "Winch drum position loop",
        "parameters": {
            "J": (4.0e-4, 3.4e-4, 4.6e-4, "kg m^2"),
            "L": (3.0e-3, 2.5e-3, 3.6e-3, "H"),
            "Tr": (5.0e-4, 2.5e-4, 1.0e-3, "s"),
            "R": (1.2, 1.2, 1.2, "ohm"),
            "B": (1.0e-3, 1.0e-3, 1.0e-3, "N m s"),
            "Kt": (0.05, 0.05, 0.05, "N m/A"),
        },
        "feedback": "negative",
        "transfer": 'transfer = "Kt / (s*(J*s + B)*(L*s + R))"\n',
        "sensor": 'sensor = "Tr*s + 1"\n',
    },
    "lift": {
        "title": "Hoist platform with an unstable mode",
        "parameters": {
            "p": (1.0, 1.0, 1.0, "1/s"),
            "a": (4.0, 3.5, 4.5, "1/s"),
            "b": (6.0, 5.0, 7.0, "1/s"),
        },
        "feedback": "negative",
        "transfer": 'transfer = "1 / ((s - p)*(s + a)*(s + b))"\n',
        "sensor": "",
    },
    "kiln": {
        "title": "Kiln draught loop (positive feedback)",
        "parameters": {
            "a": (1.0, 0.8, 1.2, "1/s"),
            "b": (2.0, 1.6, 2.4, "1/s"),
            "c": (3.0, 2.5, 3.5, "1/s"),
        },
        "feedback": "positive",
        "transfer": 'transfer = "1 / ((s + a)*(s + b)*(s + c))"\n',
        "sensor": "",
    },
}
# kept for the older tests
PARAMETERS = FAMILIES["winch"]["parameters"]
UNCERTAIN = ("J", "L", "Tr")


def polynomials(values: dict[str, np.ndarray], family: str = "winch") -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator stacks, highest power first, of one family."""
    v = {n: np.atleast_1d(np.asarray(x, float)) for n, x in values.items()}
    if family == "winch":
        J, L, Tr, R, B, Kt = (v[n] for n in ("J", "L", "Tr", "R", "B", "Kt"))
        D = np.stack([J * L, J * R + B * L, B * R, np.zeros_like(J)], axis=1)
        N = np.stack([Kt * Tr, Kt], axis=1)
    elif family == "lift":
        p, a, b = v["p"], v["a"], v["b"]
        D = np.stack([np.ones_like(a), a + b - p, a * b - p * a - p * b, -p * a * b], axis=1)
        N = np.ones((a.size, 1))
    elif family == "kiln":
        a, b, c = v["a"], v["b"], v["c"]
        D = np.stack([np.ones_like(a), a + b + c, a * b + b * c + c * a, a * b * c], axis=1)
        N = np.ones((a.size, 1))
    else:
        raise ValueError(family)
    return N, D


def closed_form(N: np.ndarray, D: np.ndarray, family: str = "winch") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Critical gain, crossing frequency and lower end from the cubic Routh criterion (from memory).

    For the reference gain inside the stable interval (``winch`` and ``kiln``
    from 0+, ``lift`` anywhere between its ends).
    """
    a3, a2, a1, a0 = D.T
    with np.errstate(divide="ignore", invalid="ignore"):
        if family == "winch":
            b1, b0 = N.T
            den = a3 * b0 - a2 * b1
            kc = np.where(den > 0, (a2 * a1 - a3 * a0) / den, np.inf)
            w = np.where(np.isfinite(kc), np.sqrt((a1 + kc * b1) / a3), np.nan)
            low = np.zeros_like(kc)
        elif family == "lift":
            low = -a0  # k - pab > 0
            kc = low + a2 * a1
            w = np.sqrt(a1)
        else:  # kiln: P = D - k, constant term a0 - k
            kc = a0.copy()
            w = np.zeros_like(kc)
            low = np.zeros_like(kc)
    return kc, w, low


def char_roots(N: np.ndarray, D: np.ndarray, k: float, sigma: int = 1) -> np.ndarray:
    """Roots of ``D + sigma k N`` for one variant (1-D coefficient arrays)."""
    P = D.astype(float).copy()
    P[-N.size:] += sigma * k * N
    return np.roots(P)


# ------------------------------------------------------------------ numeric reference analysis

def _stable(N, D, k, sigma) -> bool:
    return bool(char_roots(N, D, k, sigma).real.max() < 0)


def boundaries(N: np.ndarray, D: np.ndarray, sigma: int, lo: float, hi: float) -> list[tuple[float, float]]:
    """Sorted ``(k, w)`` where a root of ``D + sigma k N`` is on the imaginary axis, ``lo < k < hi``.

    METHODS, "Crossings of the imaginary axis": real ``w > 0`` with
    ``Im[D(jw) N(-jw)] = 0`` give ``k = -D(jw) / (sigma N(jw))``; the origin
    gives ``k = -D(0) / (sigma N(0))``; equal degrees give a root through
    infinity where the leading coefficient vanishes.
    """
    out: list[tuple[float, float]] = []
    q = np.polymul(D, N * (-1.0) ** np.arange(N.size - 1, -1, -1))  # D(s) N(-s)
    # q(jw) = sum c_i (jw)^i; imaginary part as a real polynomial in w (highest power first)
    deg = q.size - 1
    im = np.array([c * (1j ** (deg - i)).imag for i, c in enumerate(q)])
    im = np.trim_zeros(im, "f")
    if im.size > 1:
        for r in np.roots(im):
            if abs(r.imag) > 1e-7 * (1 + abs(r)) or r.real <= 1e-12:
                continue
            w = float(r.real)
            nj = np.polyval(N, 1j * w)
            if abs(nj) < 1e-14:
                continue
            k = -np.polyval(D, 1j * w) / (sigma * nj)
            if abs(k.imag) < 1e-7 * (1 + abs(k)) and lo < k.real < hi:
                out.append((float(k.real), w))
    if N[-1] != 0:
        k = -D[-1] / (sigma * N[-1])
        if lo < k < hi:
            out.append((float(k), 0.0))
    if N.size == D.size and N[0] != 0:
        k = -D[0] / (sigma * N[0])
        if lo < k < hi:
            out.append((float(k), np.inf))
    out.sort()
    return out


def reference_analysis(N: np.ndarray, D: np.ndarray, *, sigma: int, gain_range=(0.0, np.inf),
                       k_ref: float | None = None) -> dict:
    """Critical gain and friends for one variant, by roots at gains between the boundary gains."""
    lo, hi = gain_range
    b = boundaries(N, D, sigma, lo, hi)
    ks = [g for g, _ in b]
    edges = [lo] + ks + [hi]

    def inside(i):  # a gain inside (edges[i], edges[i+1])
        a, c = edges[i], edges[i + 1]
        if np.isinf(c):
            return 2 * a + 1
        return 0.5 * (a + c) if a > 0 else c / 2
    stable_int = [_stable(N, D, inside(i), sigma) for i in range(len(edges) - 1)]
    ref = lo if k_ref is None else k_ref
    i = int(np.searchsorted(np.array(ks), ref, side="right"))  # interval index holding ref (from above)
    out = {"boundary": b, "stable_above": [int(s) for s in stable_int[1:]],
           "stable_at_start": int(stable_int[0]), "stable_at_reference": int(stable_int[i])}
    if stable_int[i]:
        out["critical_gain"] = edges[i + 1]
        out["critical_gain_low"] = edges[i]
        out["crossing_frequency"] = b[i][1] if i < len(b) else np.nan
    else:
        out["critical_gain"] = out["critical_gain_low"] = out["crossing_frequency"] = np.nan
    return out


def _match(prev: np.ndarray, cur: np.ndarray) -> np.ndarray:
    """Reorder ``cur`` (V, n) to continue ``prev`` (V, n): best of all permutations."""
    n = prev.shape[1]
    perms = np.array(list(itertools.permutations(range(n))))
    cost = np.abs(cur[:, perms] - prev[:, None, :]).sum(axis=2)  # (V, P)
    best = perms[np.argmin(cost, axis=1)]
    return np.take_along_axis(cur, best, axis=1)


def _designs(designs: Sequence[str], samples: int, levels: int, seed: int,
             ranges: dict[str, tuple[float, float, float, str]]):
    rng = np.random.default_rng(seed)
    unc = [n for n, (_nom, lo, hi, _u) in ranges.items() if hi > lo]
    rows: list[dict[str, float]] = []
    labels: list[str] = []
    for d in designs:
        if d == "nominal":
            pts = [{n: ranges[n][0] for n in unc}]
        elif not unc:
            pts = []  # every design reduces to the nominal (DESIGN section 3)
        elif d == "corners":
            pts = [dict(zip(unc, [ranges[n][1 + b] for n, b in zip(unc, bits)]))
                   for bits in itertools.product((0, 1), repeat=len(unc))]
        elif d == "grid":
            axes = [np.linspace(ranges[n][1], ranges[n][2], levels) for n in unc]
            pts = [dict(zip(unc, combo)) for combo in itertools.product(*axes)]
        elif d in ("random", "lhs", "sobol"):
            u = rng.random((samples, len(unc)))
            pts = [{n: ranges[n][1] + u[i, j] * (ranges[n][2] - ranges[n][1])
                    for j, n in enumerate(unc)} for i in range(samples)]
        else:
            raise ValueError(d)
        rows += pts
        labels += [d] * len(pts)
    if not rows:
        rows, labels = [{n: ranges[n][0] for n in unc}], ["nominal"]
    values = {n: np.array([r[n] for r in rows]) for n in unc}
    V = len(rows)
    for n, (nom, _lo, _hi, _u) in ranges.items():
        if n not in unc:
            values[n] = np.full(V, nom)
    return {n: values[n] for n in ranges}, np.array(labels)


def make_dataset(
    *,
    family: str = "winch",
    designs: Sequence[str] = ("nominal", "corners", "random"),
    samples: int = 40,
    levels: int = 3,
    seed: int = 1,
    operating_gain: float | None = None,
    with_operating_quantities: bool = True,
    rate_range: tuple[float, float, float] | None = None,
    ranges: dict[str, tuple[float, float, float, str]] | None = None,
    points: int = 80,
    keep: str = "all",
    title: str | None = None,
) -> xr.Dataset:
    """Build a result dataset with the DESIGN section 4 schema for one of the families.

    Parameters
    ----------
    family
        ``"winch"``, ``"lift"`` or ``"kiln"`` (see the module docstring).
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
        ``winch`` only: ``(nominal, low, high)`` of ``Tr``.  ``Tr >= J L / (J R + B L)``
        (about 2.1e-3 to 2.9e-3 s over the box) makes the critical gain ``inf``;
        ``(2e-3, 1e-3, 4e-3)`` gives a mix of finite and infinite critical gains.
    ranges
        Replace the family's parameter table (same names); equal low and high fix one.
    points
        Gains on the locus grid.
    keep
        ``"all"``, ``"corners"`` (nominal and corners), ``"random:N"`` or
        ``"none"``: which loci are stored.
    """
    fam = FAMILIES[family]
    ranges = dict(ranges or fam["parameters"])
    if rate_range is not None:
        ranges["Tr"] = (*rate_range, "s")
    title = fam["title"] if title is None else title
    sigma = 1 if fam["feedback"] == "negative" else -1
    values, labels = _designs(designs, samples, levels, seed, ranges)
    V = labels.size
    N, D = polynomials(values, family)
    n = D.shape[1] - 1
    k_ref = 0.0 if operating_gain is None else float(operating_gain)

    refs = [reference_analysis(N[v], D[v], sigma=sigma, k_ref=operating_gain) for v in range(V)]
    crit = np.array([r["critical_gain"] for r in refs], float)
    crit_low = np.array([r["critical_gain_low"] for r in refs], float)
    wc = np.array([r["crossing_frequency"] for r in refs], float)
    stable_ref = np.array([r["stable_at_reference"] for r in refs], bool)
    width = max(1, max(len(r["boundary"]) for r in refs))
    bgain = np.full((V, width), np.nan)
    bfreq = np.full((V, width), np.nan)
    babove = np.full((V, width), -1, np.int8)
    for v, r in enumerate(refs):
        for j, (g, w) in enumerate(r["boundary"]):
            bgain[v, j], bfreq[v, j], babove[v, j] = g, w, r["stable_above"][j]

    poles = np.array([np.sort_complex(np.roots(d)) for d in D])  # (V, n)
    m = N.shape[1] - 1
    zeros = (np.array([np.sort_complex(np.roots(nn)) for nn in N]) if m else np.zeros((V, 0), complex))
    centroid = (poles.real.sum(1) - zeros.real.sum(1)) / (n - m)
    # breakaway: real roots of N D' - N' D with k = -D/(sigma N) real and > 0
    bk_pts = np.full((V, 2 * n), np.nan)
    bk_gain = np.full((V, 2 * n), np.nan)
    for v in range(V):
        eq = np.polysub(np.polymul(N[v], np.polyder(D[v])), np.polymul(np.polyder(N[v]), D[v]))
        r = np.roots(np.trim_zeros(eq, "f")) if np.any(eq) else np.zeros(0)
        r = r[np.abs(r.imag) < 1e-9 * (1 + np.abs(r.real))].real
        k = -np.polyval(D[v], r) / (sigma * np.polyval(N[v], r))
        ok = np.isfinite(k) & (k > 0)
        r, k = r[ok], k[ok]
        order = np.argsort(k)
        bk_pts[v, : r.size] = r[order]
        bk_gain[v, : r.size] = k[order]

    # common gain grid: log spaced, with the nominal's boundary gains and the operating gain on it
    finite = crit[np.isfinite(crit)]
    top = (finite.max() if finite.size else 100.0) * 30
    grid = np.geomspace(top / 1e5, top, points)
    specials = [g for g, _w in refs[0]["boundary"]]
    if operating_gain is not None:
        specials.append(k_ref)
    for g in specials:
        grid[np.argmin(np.abs(np.log(grid) - np.log(g)))] = g
    grid = np.unique(grid)
    G = grid.size

    # roots of every variant on the grid (for the envelope), branches matched gain to gain
    roots = np.empty((V, G, n), complex)
    for gi, g in enumerate(grid):
        P = D.copy()
        P[:, n - m:] += sigma * g * N
        comp = np.zeros((V, n, n))
        comp[:, 0, :] = -P[:, 1:] / P[:, :1]
        for i in range(1, n):
            comp[:, i, i - 1] = 1.0
        cur = np.linalg.eigvals(comp)
        roots[:, gi] = cur if gi == 0 else _match(roots[:, gi - 1], cur)
    absc = roots.real.max(axis=2)

    if keep == "all":
        kept = np.arange(V)
    elif keep == "corners":
        kept = np.flatnonzero(np.isin(labels, ["nominal", "corners"]))
    elif keep.startswith("random:"):
        cnt = min(int(keep.split(":")[1]), V)
        kept = np.sort(np.random.default_rng(seed + 99).choice(V, cnt, replace=False))
    else:
        kept = np.arange(0)

    ds = xr.Dataset(coords={"variant": np.arange(V), "gain": grid,
                            "design": ("variant", labels.astype(str))})
    ds["gain"].attrs.update(long_name="loop gain k", units="1")
    ds["design"].attrs.update(long_name="design", units="")
    for name, (_nom, _lo, _hi, unit) in ranges.items():
        ds.coords[name] = ("variant", values[name], {"long_name": name, "units": unit})

    def put(name, dims, data, long_name, units):
        ds[name] = (dims, data, {"long_name": long_name, "units": units})

    put("critical_gain", "variant", crit, "critical gain", "1")
    put("critical_gain_low", "variant", crit_low, "lower end of the stable interval", "1")
    put("crossing_frequency", "variant", wc, "crossing frequency at the critical gain", "rad/s")
    put("stable_at_reference", "variant", stable_ref.astype(np.int8), "stable at the reference gain", "1")
    put("stable_at_start", "variant", np.array([r["stable_at_start"] for r in refs], np.int8),
        "stable just above the range start", "1")
    put("asymptote_centroid", "variant", centroid, "asymptote centroid", "1/s")
    put("ill_conditioned", "variant", np.zeros(V, np.int8), "could not be computed to full precision", "1")
    put("routh_agrees", "variant", np.ones(V, np.int8), "Routh count agrees", "1")
    put("boundary_gain", ("variant", "boundary"), bgain, "boundary gain", "1")
    put("boundary_frequency", ("variant", "boundary"), bfreq, "boundary frequency", "rad/s")
    put("stable_above", ("variant", "boundary"), babove, "stable just above the boundary gain", "1")
    put("open_loop_pole_real", ("variant", "pole"), poles.real, "open-loop pole, real part", "1/s")
    put("open_loop_pole_imag", ("variant", "pole"), poles.imag, "open-loop pole, imaginary part", "rad/s")
    put("open_loop_zero_real", ("variant", "zero"), zeros.real, "open-loop zero, real part", "1/s")
    put("open_loop_zero_imag", ("variant", "zero"), zeros.imag, "open-loop zero, imaginary part", "rad/s")
    put("departure_angle", ("variant", "pole"), np.full((V, n), np.nan), "departure angle", "degree")
    put("arrival_angle", ("variant", "zero"), np.full((V, m), np.nan), "arrival angle", "degree")
    put("breakaway_point", ("variant", "breakaway"), bk_pts, "breakaway point", "1/s")
    put("breakaway_gain", ("variant", "breakaway"), bk_gain, "gain at the breakaway point", "1")

    if with_operating_quantities:
        if operating_gain is None:
            nanv = np.full(V, np.nan)
            cl = cli = np.full((V, n), np.nan)
            gm = gmdb = lgm = zeta = dom = nanv
        else:
            clr = np.array([np.sort_complex(char_roots(N[v], D[v], k_ref, sigma)) for v in range(V)])
            cl, cli = clr.real, clr.imag
            with np.errstate(divide="ignore", invalid="ignore"):
                gm = np.where(stable_ref, crit / k_ref, np.nan)
                gmdb = 20 * np.log10(gm)
                lgm = np.where(stable_ref, crit_low / k_ref, np.nan)
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

    toml = _config_text(fam, title, ranges, designs, samples, levels, seed, operating_gain, points, keep)
    ds.attrs.update(
        title=title, config=toml, config_sha256=hashlib.sha256(toml.encode()).hexdigest(),
        seed=seed, designs=",".join(designs), feedback=fam["feedback"],
        created="2026-01-01T00:00:00+00:00", sweep_version="test",
        reference_gain=k_ref,
    )
    if operating_gain is not None:
        ds.attrs["operating_gain"] = k_ref
    return ds


def variant_polynomials(ds: xr.Dataset, i: int, family: str = "winch") -> tuple[np.ndarray, np.ndarray]:
    """``(N, D)`` 1-D coefficient arrays of variant ``i`` rebuilt from its stored parameters."""
    names = FAMILIES[family]["parameters"]
    N, D = polynomials({n: np.array([float(ds[n].values[i])]) for n in names}, family)
    return N[0], D[0]


def not_computed(ds: xr.Dataset, idx: Sequence[int]) -> xr.Dataset:
    """A copy in which the variants ``idx`` are stable at the reference gain but have no number.

    That is how the runner stores a variant whose critical gain could not be
    computed to full precision (NaN and ``ill_conditioned = 1``).
    """
    out = ds.copy(deep=True)
    idx = np.asarray(idx, int)
    for name in ("critical_gain", "critical_gain_low", "crossing_frequency", "gain_margin",
                 "gain_margin_db"):
        if name in out:
            out[name].values[idx] = np.nan
    out["stable_at_reference"].values[idx] = 1
    out["ill_conditioned"].values[idx] = 1
    return out


def _config_text(fam, title, ranges, designs, samples, levels, seed, operating_gain, points, keep) -> str:
    lines = [f'title = "{title}"', "", "[parameters]"]
    for n, (nom, lo, hi, unit) in ranges.items():
        if lo == hi:
            lines.append(f'{n} = {{ nominal = {nom!r}, dist = "fixed", units = "{unit}" }}')
        else:
            lines.append(f'{n} = {{ nominal = {nom!r}, low = {lo!r}, high = {hi!r}, units = "{unit}" }}')
    lines += ["", "[plant]", fam["transfer"].rstrip(), "", "[loop]"]
    if fam["sensor"]:
        lines.append(fam["sensor"].rstrip())
    lines += [f'feedback = "{fam["feedback"]}"', "gain_range = [0, inf]"]
    if operating_gain is not None:
        lines.append(f"operating_gain = {operating_gain!r}")
    keep_text = keep if keep in ("all", "none", "corners") or keep.startswith("random:") else "all"
    lines += ["", "[sweep]", "designs = [" + ", ".join(f'"{d}"' for d in designs) + "]",
              f"samples = {samples}", f"levels = {levels}", f"seed = {seed}",
              "", "[locus]", f"points = {points}", f'keep = "{keep_text}"', ""]
    return "\n".join(lines)



def tiled(ds: xr.Dataset, times: int, *, jitter: float = 0.02, seed: int = 5) -> xr.Dataset:
    """A large dataset for figure tests: the variants of ``ds`` repeated ``times`` times.

    The copies' sampled parameters and critical gains are scaled by a small
    random factor so points do not sit on each other; the nominal stays once.
    Only for drawing: the numbers are no longer a consistent analysis.
    """
    rng = np.random.default_rng(seed)
    rest = ds.isel(variant=slice(1, None))
    parts = [ds.isel(variant=slice(0, 1))]
    for _ in range(times):
        part = rest.copy(deep=True)
        f = 1 + jitter * rng.standard_normal(part.sizes["variant"])
        sampled = np.isin(part["design"].values, ("random", "lhs", "sobol"))
        for name in ("critical_gain", "crossing_frequency"):
            part[name].values[:] = np.where(sampled, part[name].values * f, part[name].values)
        parts.append(part.drop_vars(["locus_real", "locus_imag", "locus_variant"]))
    big = xr.concat([p.drop_vars(["locus_real", "locus_imag", "locus_variant"], errors="ignore")
                     for p in parts], dim="variant", data_vars="minimal", coords="minimal",
                    compat="override")
    big = big.assign_coords(variant=np.arange(big.sizes["variant"]))
    # every copy keeps its locus: locus_variant maps to the new variant numbers
    lv = np.asarray(ds["locus_variant"].values)
    n = ds.sizes["variant"] - 1
    new_lv = np.concatenate([lv[lv == 0]] + [lv[lv > 0] + k * n for k in range(times)])
    reps = [ds["locus_real"].values[lv == 0]] + [ds["locus_real"].values[lv > 0]] * times
    repi = [ds["locus_imag"].values[lv == 0]] + [ds["locus_imag"].values[lv > 0]] * times
    big.coords["locus_variant"] = ("locus_variant", new_lv, dict(ds["locus_variant"].attrs))
    big["locus_real"] = (("locus_variant", "gain", "branch"), np.concatenate(reps), ds["locus_real"].attrs)
    big["locus_imag"] = (("locus_variant", "gain", "branch"), np.concatenate(repi), ds["locus_imag"].attrs)
    big.attrs = dict(ds.attrs)
    return big
