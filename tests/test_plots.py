"""Tests of sweep.plots: every kind in every format gives a non-blank image; input errors."""
from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest

from sweep.errors import InputError
from sweep.plots import FORMATS, KINDS, figure, plane_table, plot

from datasets import make_dataset

DPI = 60


@pytest.fixture(scope="module")
def ds():
    # small: grid for the plane, random for spread, inf and unstable variants for the edge marks
    return make_dataset(designs=("nominal", "corners", "grid", "random"), samples=12, levels=3,
                        rate_range=(2e-3, 1e-3, 4e-3), operating_gain=12.0, points=40)


def _check_png(path):
    import matplotlib.image as mpimg

    img = mpimg.imread(path)
    rgb = img[..., :3]
    non_white = np.mean(np.any(rgb < 0.95, axis=-1))
    assert rgb.std() > 0.05
    assert non_white > 0.02  # more than a frame and a title


def _check_svg(path):
    root = ET.parse(path).getroot()
    paths = [e for e in root.iter() if e.tag.endswith("path")]
    assert len(paths) > 20


def _check_pdf(path):
    data = path.read_bytes()
    assert data.startswith(b"%PDF")
    assert len(data) > 5000


CHECK = {"png": _check_png, "svg": _check_svg, "pdf": _check_pdf}


@pytest.mark.parametrize("what", KINDS)
@pytest.mark.parametrize("ext", sorted(FORMATS))
def test_every_kind_every_format(ds, tmp_path, what, ext):
    out = tmp_path / f"{what}{ext}"
    got = plot(ds, what, out, params=("Tr", "L"), dpi=DPI)
    assert got == out and out.exists()
    CHECK[FORMATS[ext]](out)


@pytest.mark.parametrize("what", ("locus", "limits", "envelope", "crossings"))
def test_plain_dataset_without_operating_gain(tmp_path, what):
    ds = make_dataset(designs=("nominal", "corners", "random"), samples=10, points=30,
                      with_operating_quantities=False)
    _check_png(plot(ds, what, tmp_path / "a.png", dpi=DPI))


def test_figure_for_notebooks(ds):
    import matplotlib.pyplot as plt

    fig = figure(ds, "limits")
    assert fig.axes and fig._suptitle.get_text() == "Winch drum position loop"
    labels = [ax.get_xlabel() for ax in fig.axes if ax.get_visible()]
    assert any("H]" in lab for lab in labels)  # units from the coordinate attributes
    plt.close(fig)


def test_plane_table_against_numpy(ds):
    a, b, t = plane_table(ds, ("Tr", "L"))
    m = ds["design"].values == "grid"
    tr, ll = ds["Tr"].values[m], ds["L"].values[m]
    crit = ds["critical_gain"].values[m]
    stab = ds["stable_at_reference"].values[m]
    for j, lv in enumerate(t["b"]):
        for i, tv in enumerate(t["a"]):
            sel = (tr == tv) & (ll == lv)
            if (stab[sel] == 0).any():
                assert np.isnan(t["value"][j, i])
            else:
                assert t["value"][j, i] == crit[sel].min()
    assert t["others"] == ["J"]


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


def test_bad_kind_and_extension(ds, tmp_path):
    with pytest.raises(InputError, match="did you mean 'locus'"):
        plot(ds, "locuss", tmp_path / "a.png")
    with pytest.raises(InputError, match=".png, .svg or .pdf"):
        plot(ds, "locus", tmp_path / "a.jpg")
    no_loci = make_dataset(samples=4, points=20, keep="none")
    with pytest.raises(InputError, match="keep"):
        plot(no_loci, "locus", tmp_path / "b.png")


def test_matplotlib_only_here():
    # the pure modules must not pull in matplotlib (common practice: keep plotting optional)
    import subprocess
    import sys

    code = "import sys, sweep.query; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
