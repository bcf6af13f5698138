"""Tests of sweep.store: atomic parts, validation, streamed merge, schema of the result."""
from __future__ import annotations

import os

import numpy as np
import pytest
import xarray as xr

from sweep import store

G, B = 5, 3


def fake_part(start: int, stop: int, kept=(), sha="abc") -> store.Part:
    """A synthetic part in the layout `sweep.runner.compute_chunk` produces."""
    V = store.Var
    v = np.arange(start, stop)
    n = v.size
    rng = np.random.default_rng(start)
    kept = np.array([k for k in kept if start <= k < stop], dtype=np.int64)
    ab = rng.normal(size=(n, G))
    cg = rng.random(n)
    cg[0] = np.nan
    coords = {
        "variant": V(("variant",), v, {"long_name": "variant index", "units": "1"}),
        "R": V(("variant",), 1 + 0.01 * v, {"long_name": "parameter R", "units": "ohm"}),
        "design": V(("variant",), np.where(v == 0, "nominal", "random"), {"long_name": "design", "units": ""}),
        "gain": V(("gain",), np.geomspace(0.1, 10, G), {"long_name": "gain", "units": "1"}),
        "locus_variant": V(("locus_variant",), kept, {"long_name": "variant of the locus", "units": "1"}),
    }
    data = {
        "critical_gain": V(("variant",), cg, {"long_name": "critical gain", "units": "1"}),
        "stable_above": V(("variant", "boundary"), np.full((n, 2), -1, np.int8), {"long_name": "s", "units": "1"}),
        "open_loop_zero_real": V(("variant", "zero"), np.zeros((n, 0)), {"long_name": "z", "units": "1/s"}),
        "locus_real": V(("locus_variant", "gain", "branch"), rng.random((kept.size, G, B)).astype(np.float32),
                        {"long_name": "lr", "units": "1/s"}),
        "envelope_min": V(("gain",), ab.min(0), {}),
        "envelope_max": V(("gain",), ab.max(0), {}),
        "envelope_sum": V(("gain",), ab.sum(0), {}),
        "envelope_count": V(("gain",), np.full(G, n, np.int64), {}),
    }
    return store.Part({**coords, **data}, tuple(coords),
                      {"config_sha256": sha, "variant_start": start, "variant_stop": stop})


def test_write_read_roundtrip_and_validation(tmp_path):
    p = store.write_part(fake_part(0, 4, kept=[1]), tmp_path / "chunk-00000.nc")
    assert [f.name for f in tmp_path.iterdir()] == ["chunk-00000.nc"]  # no temporary left
    part = store.read_part(p, config_sha256="abc", start=0, stop=4)
    assert np.isnan(part["critical_gain"][0]) and part["design"][0] == "nominal"
    written = fake_part(0, 4, kept=[1])
    assert part.coords == written.coords and part.attrs == written.attrs
    for name, var in written.variables.items():  # every variable back exactly, with its dims and attributes
        got = part.variables[name]
        assert got.dims == var.dims and got.attrs == var.attrs, name
        assert got.values.dtype == var.values.dtype or var.values.dtype.kind == "U", name
        np.testing.assert_array_equal(got.values.astype(var.values.dtype), var.values)
    # a part is a plain netCDF file (its variables grouped in blocks), readable without sweep
    with xr.open_dataset(p) as ds:
        assert ds.sizes["variant"] == 4 and ds.attrs["variant_stop"] == 4
    with pytest.raises(store.PartError, match="another config"):
        store.read_part(p, config_sha256="other")
    with pytest.raises(store.PartError, match="expected"):
        store.read_part(p, start=4, stop=8)
    with open(p, "r+b") as fh:
        fh.truncate(os.path.getsize(p) // 2)
    with pytest.raises(store.PartError, match="unreadable"):
        store.read_part(p)


def test_merge(tmp_path):
    parts = [fake_part(a, min(a + 4, 10), kept=[0, 5, 9]) for a in range(0, 10, 4)]
    paths = [store.write_part(d, tmp_path / f"chunk-{i:05d}.nc") for i, d in enumerate(parts)]
    out = store.merge_parts(paths, tmp_path / "r.nc", {"title": "pump", "seed": 0})
    with xr.open_dataset(out) as ds:
        ds = ds.load()
    np.testing.assert_array_equal(ds.critical_gain, np.concatenate([d["critical_gain"] for d in parts]))
    np.testing.assert_array_equal(ds.R, np.concatenate([d["R"] for d in parts]))
    assert ds.design.dtype.kind in "UO" and list(ds.design.values[:2]) == ["nominal", "random"]
    assert set(ds.coords) >= {"variant", "R", "design", "gain", "locus_variant"}
    np.testing.assert_array_equal(ds.locus_variant, [0, 5, 9])
    np.testing.assert_array_equal(ds.locus_real.values,
                                  np.concatenate([d["locus_real"] for d in parts]))
    assert ds.locus_real.dtype == np.float32 and ds.locus_real.encoding["zlib"]
    assert ds.sizes["zero"] == 0 and ds.stable_above.dtype == np.int8
    ab = np.concatenate([np.random.default_rng(a).normal(size=(min(a + 4, 10) - a, G)) for a in range(0, 10, 4)])
    np.testing.assert_allclose(ds.abscissa_min, ab.min(0))
    np.testing.assert_allclose(ds.abscissa_max, ab.max(0))
    np.testing.assert_allclose(ds.abscissa_mean, ab.mean(0))
    assert not any(v in ds for v in store.ENVELOPE_VARS)
    for name in list(ds.variables):
        assert "long_name" in ds[name].attrs and "units" in ds[name].attrs, name
    assert ds.attrs["title"] == "pump" and ds.attrs["seed"] == 0
    assert sorted(f.name for f in tmp_path.iterdir() if f.name.startswith(".")) == []


def test_merge_refuses_gaps(tmp_path):
    a = store.write_part(fake_part(0, 4), tmp_path / "a.nc")
    b = store.write_part(fake_part(5, 8), tmp_path / "b.nc")
    with pytest.raises(store.PartError, match="expected 4"):
        store.merge_parts([a, b], tmp_path / "r.nc", {})
    assert not (tmp_path / "r.nc").exists()


def test_result_writer_any_order_equals_merge(tmp_path):
    """Parts added as they arrive, in any order, give the file merged in chunk order (the mean too, bit for bit)."""
    parts = [fake_part(a, min(a + 4, 10), kept=[0, 5, 9]) for a in range(0, 10, 4)]
    paths = [store.write_part(d, tmp_path / f"chunk-{i:05d}.nc") for i, d in enumerate(parts)]
    ordered = store.merge_parts(paths, tmp_path / "ordered.nc", {"title": "pump"})
    writer = store.ResultWriter(tmp_path / "any.nc", total=10, kept=np.array([0, 5, 9]))
    for i in (2, 0, 1):
        writer.add(store.read_part(paths[i]), paths[i].name)
    assert (tmp_path / "any.nc").exists() is False  # only the temporary file so far
    writer.finish({"title": "pump"})
    with xr.open_dataset(ordered) as a, xr.open_dataset(tmp_path / "any.nc") as b:
        xr.testing.assert_identical(a.load(), b.load())


def test_result_writer_refusals(tmp_path):
    def writer():
        return store.ResultWriter(tmp_path / "r.nc", total=10, kept=np.array([0, 5]))

    w = writer()
    w.add(fake_part(0, 4, kept=[0]))
    with pytest.raises(store.PartError, match="already merged"):
        w.add(fake_part(0, 4, kept=[0]))
    with pytest.raises(store.PartError, match="kept loci"):
        w.add(fake_part(4, 8, kept=[]))  # variant 5 must keep its locus
    bad = fake_part(4, 8, kept=[5])
    del bad.variables["critical_gain"]
    with pytest.raises(store.PartError, match="other variables"):
        w.add(bad)
    with pytest.raises(store.PartError, match="outside the sweep"):
        w.add(fake_part(8, 12, kept=[]))
    w.add(fake_part(8, 10, kept=[]))
    with pytest.raises(store.PartError, match="variants from 4 are missing"):
        w.finish({})
    w.abort()
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # no result, no temporary file
