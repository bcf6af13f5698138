"""Result files: the only module that reads or writes netCDF.

A run writes one *part* file per chunk of variants (`write_part`), checks
existing parts before reusing them (`read_part`) and, at the end, merges the
parts into the result (`merge_parts`). Every file appears atomically: it is
written under a temporary name in the same folder, flushed to disk, renamed
over the final name, and the folder is flushed too, so a crash leaves either
the old state or the complete new file, never half a file under the final
name.

Part layout (one chunk, made by `sweep.runner.compute_chunk`): the result's
variables restricted to the chunk's variants (dimension ``variant``), the
kept loci of those variants (dimension ``locus_variant``, possibly empty),
the ``gain`` grid, and the chunk's spectral-abscissa envelope as
``envelope_min``, ``envelope_max``, ``envelope_sum``, ``envelope_count``
(along ``gain``). Global attributes ``config_sha256``, ``variant_start``,
``variant_stop`` tie it to one config and one variant range.

The merge streams: it reads one part at a time and appends its slices to the
output written directly with netCDF4, so its memory does not grow with the
number of variants.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Callable, Iterable, Mapping

import netCDF4
import numpy as np
import xarray as xr

from .errors import SweepError
from .locus import Envelope

__all__ = [
    "PartError",
    "ENVELOPE_VARS",
    "write_part",
    "read_part",
    "merge_parts",
    "open_result",
    "result_attrs",
]

# part-only variables: the envelope's streaming sums, folded into abscissa_* by the merge
ENVELOPE_VARS = ("envelope_min", "envelope_max", "envelope_sum", "envelope_count")

# variables stored as float32 and compressed (DESIGN section 4)
_COMPRESSED = ("locus_real", "locus_imag")

_ABSCISSA_ATTRS = {
    "abscissa_min": {"long_name": "smallest spectral abscissa over all variants", "units": "1/s"},
    "abscissa_max": {"long_name": "largest spectral abscissa over all variants", "units": "1/s"},
    "abscissa_mean": {"long_name": "mean spectral abscissa over all variants", "units": "1/s"},
}


class PartError(SweepError):
    """A part file that cannot be used (unreadable, another config, wrong range)."""


# ---------------------------------------------------------------- atomic files


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # some file systems do not open folders; the rename is still atomic
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.tmp-{os.getpid()}")


def _publish(tmp: Path, path: Path) -> None:
    """fsync ``tmp``, rename it over ``path``, fsync the folder."""
    _fsync_file(tmp)
    os.replace(tmp, path)
    _fsync_dir(path.parent)


# ---------------------------------------------------------------- parts


def write_part(ds: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write one chunk's dataset atomically.

    Parameters
    ----------
    ds
        The part dataset (see the module docstring for its layout).
    path
        Final name, e.g. ``OUT.parts/chunk-00003.nc``.

    Returns
    -------
    Path
        ``path``.
    """
    path = Path(path)
    tmp = _tmp_name(path)
    encoding = {}
    for name in _COMPRESSED:
        if name in ds:
            encoding[name] = {"dtype": "float32", "zlib": True, "complevel": 4, "shuffle": True}
    try:
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
        _publish(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def read_part(
    path: str | os.PathLike,
    *,
    config_sha256: str | None = None,
    start: int | None = None,
    stop: int | None = None,
) -> xr.Dataset:
    """Read a part file into memory and check that it belongs where it is.

    Parameters
    ----------
    path
        The part file.
    config_sha256
        If given, the part's ``config_sha256`` attribute must equal it.
    start, stop
        If given, the part must hold exactly the variants ``start <= i < stop``.

    Returns
    -------
    xarray.Dataset
        The part, loaded (the file is closed).

    Raises
    ------
    PartError
        Unreadable, truncated, another config, or another variant range.
    """
    path = Path(path)
    try:
        with xr.open_dataset(path, engine="netcdf4") as ds:
            ds = ds.load()
    except Exception as err:  # any failure to read means "compute it again"
        raise PartError(f"{path.name}: unreadable ({type(err).__name__}: {err})") from None
    attrs = ds.attrs
    if config_sha256 is not None and attrs.get("config_sha256") != config_sha256:
        raise PartError(f"{path.name}: written for another config")
    try:
        p_start, p_stop = int(attrs["variant_start"]), int(attrs["variant_stop"])
    except (KeyError, TypeError, ValueError):
        raise PartError(f"{path.name}: no variant range") from None
    if (start is not None and p_start != start) or (stop is not None and p_stop != stop):
        raise PartError(f"{path.name}: holds variants {p_start}..{p_stop}, expected {start}..{stop}")
    if "variant" not in ds.dims or not np.array_equal(ds["variant"].values, np.arange(p_start, p_stop)):
        raise PartError(f"{path.name}: variant coordinate does not match its range")
    missing = [v for v in ENVELOPE_VARS if v not in ds]
    if missing:
        raise PartError(f"{path.name}: missing {', '.join(missing)}")
    return ds


# ---------------------------------------------------------------- result


def result_attrs(config, *, created: str, sweep_version: str) -> dict[str, str | int]:
    """Global attributes of a result file (DESIGN section 4).

    Only the config's contents and library versions: no host, user or path.
    """
    import scipy

    return {
        "title": config.title,
        "config": config.text,
        "config_sha256": config.sha256,
        "seed": int(config.sweep.seed),
        "designs": ", ".join(config.sweep.designs),
        "feedback": config.feedback,
        "created": created,
        "sweep_version": sweep_version,
        "numpy_version": np.__version__,
        "scipy_version": scipy.__version__,
        "xarray_version": xr.__version__,
        "netCDF4_version": netCDF4.__version__,
    }


def _nc_type(values: np.ndarray):
    if values.dtype.kind in "UO":
        return str
    return values.dtype


def _define(out: netCDF4.Dataset, name: str, var: xr.Variable, coords_attr: str | None) -> None:
    if name in _COMPRESSED:
        g = out.dimensions["gain"].size if "gain" in out.dimensions else 1
        b = out.dimensions["branch"].size if "branch" in out.dimensions else 1
        v = out.createVariable(
            name, np.float32, var.dims, zlib=True, complevel=4, shuffle=True,
            chunksizes=(1, max(1, g), max(1, b)), fill_value=False,
        )
    else:
        kind = _nc_type(var.values)
        v = out.createVariable(name, kind, var.dims, fill_value=None if kind is str else False)
    attrs = {k: val for k, val in var.attrs.items() if not k.startswith("_") and k != "coordinates"}
    if coords_attr:
        attrs["coordinates"] = coords_attr
    v.setncatts(attrs)


def merge_parts(
    part_paths: Iterable[str | os.PathLike],
    out_path: str | os.PathLike,
    attrs: Mapping[str, object],
    *,
    _after_part: Callable[[int], None] | None = None,
) -> Path:
    """Merge part files (in the given order, contiguous variant ranges) into one result.

    Parameters
    ----------
    part_paths
        The parts in chunk order; their variant ranges must tile ``0 .. total``.
    out_path
        The result file, replaced atomically.
    attrs
        Global attributes of the result (see `result_attrs`).
    _after_part
        Called with the number of parts appended so far (progress; test hook).

    Returns
    -------
    Path
        ``out_path``.
    """
    paths = [Path(p) for p in part_paths]
    if not paths:
        raise SweepError("no parts to merge")
    out_path = Path(out_path)
    # pass 1: headers only, to size the dimensions and check the tiling
    total, kept, expect = 0, 0, 0
    for p in paths:
        with netCDF4.Dataset(p) as nc:
            a, b = int(nc.getncattr("variant_start")), int(nc.getncattr("variant_stop"))
            if a != expect:
                raise PartError(f"{p.name}: starts at variant {a}, expected {expect}")
            expect = b
            total = b
            kept += nc.dimensions["locus_variant"].size if "locus_variant" in nc.dimensions else 0

    first = read_part(paths[0])
    tmp = _tmp_name(out_path)
    try:
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as out:
            for dim, size in first.sizes.items():
                n = {"variant": total, "locus_variant": kept}.get(dim, size)
                out.createDimension(dim, n)  # a size of 0 becomes unlimited: still reads as empty
            # coordinates along variant (parameters, design) are named in each variable's attribute
            var_coords = [
                c for c in first.coords if c not in first.dims and first[c].dims == ("variant",)
            ]
            names = [n for n in list(first.coords) + list(first.data_vars) if n not in ENVELOPE_VARS]
            for name in names:
                var = first[name].variable
                ca = " ".join(var_coords) if (name in first.data_vars and "variant" in var.dims) else None
                _define(out, name, var, ca)
            for name, a in _ABSCISSA_ATTRS.items():
                v = out.createVariable(name, np.float64, ("gain",), fill_value=False)
                v.setncatts(a)
            out.setncatts(dict(attrs))

            env = None
            kv = 0
            for i, p in enumerate(paths):
                ds = first if i == 0 else read_part(p)
                a, b = int(ds.attrs["variant_start"]), int(ds.attrs["variant_stop"])
                nk = int(ds.sizes.get("locus_variant", 0))
                for name in names:
                    var = ds[name].variable
                    if "variant" in var.dims:
                        out[name][a:b, ...] = _values(var)
                    elif "locus_variant" in var.dims:
                        if nk:
                            out[name][kv:kv + nk, ...] = _values(var)
                    elif i == 0:
                        out[name][...] = _values(var)
                kv += nk
                if _after_part is not None:
                    out.sync()
                    _after_part(i + 1)
                part_env = Envelope.from_arrays(*(ds[v].values for v in ENVELOPE_VARS))
                env = part_env if env is None else env.merge(part_env)
                del ds
            out["abscissa_min"][:] = env.min
            out["abscissa_max"][:] = env.max
            out["abscissa_mean"][:] = env.mean
        _publish(tmp, out_path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out_path


def _values(var: xr.Variable) -> np.ndarray:
    v = var.values
    if v.dtype.kind == "U":  # netCDF4 writes variable-length strings from objects
        return v.astype(object)
    return v


def open_result(path: str | os.PathLike) -> xr.Dataset:
    """Open a result file (lazily) with plain xarray.

    Parameters
    ----------
    path
        A file written by `merge_parts`.

    Returns
    -------
    xarray.Dataset
    """
    return xr.open_dataset(Path(path), engine="netcdf4")


# ---------------------------------------------------------------------------
# Certificates: the result of `sweep certify`, kept beside a result file
# ---------------------------------------------------------------------------


def certificate_path(result_path: str | os.PathLike) -> Path:
    """Where the certificate belonging to a result file lives: ``<stem>.certificate.json``."""
    p = Path(result_path)
    return p.with_name(p.stem + ".certificate.json")


def write_certificate(certificate: Mapping[str, object], result_path: str | os.PathLike, *, config_sha256: str) -> Path:
    """Write a certificate beside a (possibly future) result file, atomically.

    The config hash is stored with it, so a certificate of another config is
    never shown beside a result.
    """
    import json

    from .jsonutil import to_jsonable

    path = certificate_path(result_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    body = dict(to_jsonable(dict(certificate)))
    body["config_sha256"] = config_sha256
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(body, fh, indent=2, allow_nan=False)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    return path


def read_certificate(result_path: str | os.PathLike, *, config_sha256: str) -> dict | None:
    """The certificate beside a result file, or None when absent, unreadable or of another config."""
    import json

    path = certificate_path(result_path)
    try:
        with open(path, encoding="utf-8") as fh:
            body = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(body, dict) or body.get("config_sha256") != config_sha256:
        return None

    def number(x: object) -> object:
        if x == "inf":
            return float("inf")
        if x == "-inf":
            return float("-inf")
        return float("nan") if x is None else x

    for key in ("lower", "upper", "relative_gap"):
        if key in body:
            body[key] = number(body[key])
    return body
