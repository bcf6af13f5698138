"""Tests of sweep.plots: every kind in every format draws what it promises; input errors.

PNG files are checked pixel by pixel: not blank, and the marks a reader needs
are there in their colours (the worst case in vermillion, the nominal in
black, the spread in blue...). SVG and PDF files are checked by their drawing
content (paths and the palette colours in the XML / the decompressed page
streams), since rendering them would need tools outside the project.
"""
from __future__ import annotations

import re
import sys
import xml.etree.ElementTree as ET
import zlib

import numpy as np
import pytest

from sweep.errors import InputError
from sweep.plots import (BLACK, BLUE, FORMATS, KINDS, MAX_LOCUS_LINES, ORANGE, SKY, VERMILLION,
                         _recomputed_loci, figure, plane_table, plot)

from datasets import FAMILIES, make_dataset, not_computed, tiled

DPI = 60
FIXED_WINCH = {n: (v[0], v[0], v[0], v[3]) for n, v in FAMILIES["winch"]["parameters"].items()}


@pytest.fixture(scope="module")
def ds():
    # small: grid for the plane, random for spread, inf and unstable variants for the edge marks
    return make_dataset(designs=("nominal", "corners", "grid", "random"), samples=12, levels=3,
                        rate_range=(2e-3, 1e-3, 4e-3), operating_gain=12.0, points=40)


def _rgb(hex_colour: str) -> np.ndarray:
    h = hex_colour.lstrip("#")
    return np.array([int(h[i:i + 2], 16) / 255 for i in (0, 2, 4)])


def _share(img: np.ndarray, hex_colour: str, tol: float = 0.08) -> float:
    """Fraction of pixels within ``tol`` of a colour (max channel difference)."""
    return float(np.mean(np.all(np.abs(img[..., :3] - _rgb(hex_colour)) < tol, axis=-1)))


def _png(path) -> np.ndarray:
    import matplotlib.image as mpimg

    img = mpimg.imread(path)
    rgb = img[..., :3]
    assert rgb.std() > 0.05
    assert np.mean(np.any(rgb < 0.95, axis=-1)) > 0.02  # more than a frame and a title
    return img


# the marks each kind must show (colour: smallest share of the PNG's pixels); BLUE and SKY
# marks are translucent, so in pixels they count as "bluish" (blue channel well above red)
MARKS = {
    "locus": {VERMILLION: 5e-4, BLACK: 1e-3, BLUE: 1e-3, ORANGE: 1e-4},
    "limits": {VERMILLION: 3e-5, BLACK: 3e-5, SKY: 1e-4},
    "envelope": {SKY: 1e-2, BLACK: 1e-3, VERMILLION: 1e-4},
    "crossings": {SKY: 1e-2, VERMILLION: 3e-5, BLACK: 3e-5},
    "plane": {VERMILLION: 1e-4},
}


def _bluish(img: np.ndarray) -> float:
    rgb = img[..., :3]
    return float(np.mean(rgb[..., 2] - rgb[..., 0] > 0.12))


def _check_png(path, what):
    img = _png(path)
    for colour, least in MARKS[what].items():
        share = _bluish(img) if colour in (BLUE, SKY) else _share(img, colour)
        assert share > least, (what, colour, share)


def _check_svg(path, what):
    text = path.read_text()
    root = ET.fromstring(text)
    paths = [e for e in root.iter() if e.tag.endswith("path")]
    assert len(paths) > 20
    for colour in MARKS[what]:
        assert colour.lower() in text.lower(), (what, colour)  # drawn in the palette colour


def _check_pdf(path, what):
    data = path.read_bytes()
    assert data.startswith(b"%PDF") and len(data) > 5000
    streams = []
    for m in re.finditer(rb"stream\r?\n(.*?)\r?\nendstream", data, re.S):
        try:
            streams.append(zlib.decompress(m.group(1)))
        except zlib.error:
            streams.append(m.group(1))
    page = b"\n".join(streams)
    assert len(re.findall(rb"\b[lcm]\b", page)) > 50  # lines, curves, moves: something is drawn
    # the stroke (RG) and fill (rg) colours set on the page; black may be the default (no operator)
    used = np.array([[float(v) for v in m.groups()] for m in
                     re.finditer(rb"([0-9.]+) ([0-9.]+) ([0-9.]+) (?:rg|RG)", page)] or [[1, 1, 1]])
    for colour in MARKS[what]:
        if colour != BLACK:
            assert np.any(np.all(np.abs(used - _rgb(colour)) < 2e-3, axis=1)), (what, colour)


CHECK = {"png": _check_png, "svg": _check_svg, "pdf": _check_pdf}


@pytest.mark.parametrize("what", KINDS)
@pytest.mark.parametrize("ext", sorted(FORMATS))
def test_every_kind_every_format(ds, tmp_path, what, ext):
    out = tmp_path / f"{what}{ext}"
    got = plot(ds, what, out, params=("Tr", "L"), dpi=DPI)
    assert got == out and out.exists()
    CHECK[FORMATS[ext]](out, what)
    assert sorted(p.name for p in tmp_path.iterdir()) == [out.name]  # no temporary file left


EDGE = {
    "no_operating_gain": dict(designs=("nominal", "corners", "grid", "random"), samples=10,
                              with_operating_quantities=False),
    "conditional": dict(family="lift", designs=("nominal", "corners", "grid", "lhs"), samples=20,
                        operating_gain=60.0),
    "positive": dict(family="kiln", designs=("nominal", "corners", "grid", "sobol"), samples=20),
    "all_unstable": dict(designs=("nominal", "corners", "grid", "random"), samples=12,
                         operating_gain=1000.0),
    "random_only": dict(designs=("random",), samples=30, keep="random:5"),
    "single": dict(designs=("nominal",)),
    "no_uncertain": dict(designs=("nominal", "corners"), ranges=FIXED_WINCH),
}


@pytest.mark.parametrize("case", sorted(EDGE))
@pytest.mark.parametrize("what", KINDS)
def test_edge_datasets(tmp_path, case, what):
    data = make_dataset(points=30, **EDGE[case])
    params = ("a", "b") if "a" in data.coords else ("J", "L")
    out = tmp_path / "a.png"
    if what == "plane" and case in ("single", "no_uncertain", "random_only"):
        with pytest.raises(InputError) as err:
            plot(data, what, out, params=params, dpi=DPI)
        assert ("grid" in str(err.value)) or ("vary" in str(err.value))
        assert not out.exists()
        return
    _png(plot(data, what, out, params=params, dpi=DPI))


def test_worst_and_nominal_are_marked(ds):
    # the legend names the worst variant of the query, in vermillion, and the nominal
    from sweep.query import summarize

    worst = summarize(ds)["worst"]["variant"]
    for what in ("locus", "limits"):
        fig = figure(ds, what)
        labels = [t.get_text() for leg in fig.legends + [a.get_legend() for a in fig.axes if a.get_legend()]
                  for t in leg.get_texts()]
        assert any(f"variant {worst}" in lab and "worst" in lab for lab in labels), labels
        assert any(lab.startswith("nominal") for lab in labels), labels


def test_half_planes_and_units(ds):
    fig = figure(ds, "locus")
    ax = fig.axes[0]
    assert ax.get_xlabel() == "real part [1/s]" and ax.get_ylabel() == "imaginary part [rad/s]"
    x0, x1 = ax.get_xlim()
    assert x0 < 0 < x1  # both half planes in view
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("right half plane" in lab for lab in labels)


def test_figure_for_notebooks(ds):
    fig = figure(ds, "limits")
    assert fig.axes and fig._suptitle.get_text() == "Winch drum position loop"
    labels = [ax.get_xlabel() for ax in fig.axes if ax.get_visible()]
    assert any("H]" in lab for lab in labels)  # units from the coordinate attributes


def test_no_backend_forced():
    # plain Figure objects: a notebook keeps its own backend and pyplot is never imported here
    import subprocess

    code = ("import sys; sys.path.insert(0, 'tests'); from datasets import make_dataset; "
            "from sweep.plots import figure; "
            "f = figure(make_dataset(samples=4, points=20), 'envelope'); "
            "print(type(f).__name__, 'matplotlib.pyplot' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["Figure", "False"]


def test_plane_table_against_numpy(ds):
    t = plane_table(ds, ("Tr", "L"))
    assert t.dims == ("L", "Tr") and t.name == "critical_gain_min"
    m = ds["design"].values == "grid"
    tr, ll = ds["Tr"].values[m], ds["L"].values[m]
    crit = ds["critical_gain"].values[m]
    stab = ds["stable_at_reference"].values[m]
    for lv in t["L"].values:
        for tv in t["Tr"].values:
            sel = (tr == tv) & (ll == lv)
            got = float(t.sel(L=lv, Tr=tv))
            if (stab[sel] == 0).any():
                assert np.isnan(got)
            else:
                assert got == crit[sel].min()
    assert t.attrs["others"] == "J" and t.attrs["n_variants"] == int(m.sum())


def test_plane_leaves_out_not_computed(ds):
    grid = np.flatnonzero((ds["design"].values == "grid") & (ds["stable_at_reference"].values == 1)
                          & np.isfinite(ds["critical_gain"].values))
    nc = not_computed(ds, grid[:1])
    t = plane_table(nc, ("Tr", "L"))
    assert t.attrs["not_computed"] == 1
    assert not np.isnan(t.values).all()


def test_plane_errors(ds):
    no_grid = make_dataset(designs=("nominal", "corners", "random"), samples=5, points=20)
    with pytest.raises(InputError, match="grid") as err:
        plot(no_grid, "plane", "x.png", params=("J", "L"))
    assert "nominal" in str(err.value) and "add" in str(err.value)
    with pytest.raises(InputError, match="did you mean 'Tr'"):
        plane_table(ds, ("Tx", "L"))
    with pytest.raises(InputError, match="fixed"):
        plane_table(ds, ("R", "L"))
    with pytest.raises(InputError, match="two parameters"):
        plane_table(ds, None)
    with pytest.raises(InputError, match="differ"):
        plane_table(ds, ("L", "L"))


def test_bad_kind_and_extension(ds, tmp_path):
    with pytest.raises(InputError, match="did you mean 'locus'"):
        plot(ds, "locuss", tmp_path / "a.png")
    with pytest.raises(InputError, match=".png, .svg or .pdf"):
        plot(ds, "locus", tmp_path / "a.jpg")
    no_loci = make_dataset(samples=4, points=20, keep="none")
    with pytest.raises(InputError, match="keep"):
        plot(no_loci, "locus", tmp_path / "b.png")
    assert list(tmp_path.iterdir()) == []


def test_failed_save_leaves_nothing(ds, tmp_path):
    target = tmp_path / "dir.png"
    target.mkdir()  # a folder where the image should go: saving fails
    with pytest.raises(OSError):
        plot(ds, "envelope", target, dpi=DPI)
    assert [p.name for p in tmp_path.iterdir()] == ["dir.png"]


def test_loci_not_kept_are_recomputed():
    # the nominal and worst loci come from the stored config when the sweep did not keep them;
    # checked against the stored loci of the same variants (numpy eigenvalues, tests/datasets.py)
    full = make_dataset(designs=("nominal", "corners", "random"), samples=10, points=40)
    gains = full["gain"].values
    got = _recomputed_loci(full, [0, 4], gains)
    for i in (0, 4):
        stored = full["locus_real"].values[i] + 1j * full["locus_imag"].values[i]
        # same roots at every gain, whatever the branch order (float32 storage: 1e-5 relative)
        dist = np.abs(got[i][:, :, None] - stored[:, None, :]).min(axis=2)
        assert np.all(dist <= 1e-5 * (1 + np.abs(got[i])))
    part = make_dataset(designs=("nominal", "corners", "random"), samples=10, points=40, keep="random:3")
    assert 0 not in part["locus_variant"].values
    fig = figure(part, "locus")
    notes = " ".join(t.get_text() for t in fig.axes[0].texts)
    assert "nominal locus recomputed" in notes


def test_thousands_of_variants(tmp_path):
    big = tiled(make_dataset(designs=("nominal", "corners", "random"), samples=40, points=30), 60)
    assert big.sizes["variant"] > 2500 and big.sizes["locus_variant"] > MAX_LOCUS_LINES
    fig = figure(big, "locus")
    notes = " ".join(t.get_text() for t in fig.axes[0].texts)
    assert f"{MAX_LOCUS_LINES} of" in notes  # thinned evenly, and the figure says so
    for what in ("locus", "limits", "crossings", "envelope"):
        _png(plot(big, what, tmp_path / f"{what}.png", dpi=DPI))
    svg = plot(big, "locus", tmp_path / "locus.svg", dpi=DPI)
    assert svg.stat().st_size < 8e6  # dense layers are rasterised inside vector files


def test_matplotlib_only_here():
    # the pure modules must not pull in matplotlib (common practice: keep plotting optional)
    import subprocess

    code = "import sys, sweep.query; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
