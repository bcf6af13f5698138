"""Result files: the only module that reads or writes netCDF.

A run writes one *part* file per chunk of variants (`write_part`), checks
existing parts before reusing them (`read_part`) and, at the end, merges the
parts into the result (`ResultWriter`, `merge_parts`). Every file appears atomically: it is
written under a temporary name in the same folder, flushed to disk, renamed
over the final name, and the folder is flushed too, so a crash leaves either
the old state or the complete new file, never half a file under the final
name.

Everything here talks to netCDF4 directly: a chunk's results travel as a
`Part` (plain numpy arrays with their dimension names and attributes), so
neither the chunk workers nor the run itself need to import xarray. Only
`open_result` and `Part.to_dataset` use xarray.

Part layout (one chunk, made by `sweep.runner.compute_chunk`): the result's
variables restricted to the chunk's variants (dimension ``variant``), the
kept loci of those variants (dimension ``locus_variant``, possibly empty),
the ``gain`` grid, and the chunk's spectral-abscissa envelope as
``envelope_min``, ``envelope_max``, ``envelope_sum``, ``envelope_count``
(along ``gain``). Global attributes ``config_sha256``, ``variant_start``,
``variant_stop`` tie it to one config and one variant range. On disk a
part groups its variables into blocks (see `write_part`): a part is a
temporary file read back only by `read_part`. Parts are not
compressed, not even the kept loci: they live only until the merge, and
compressing them would cost more than computing them (zlib on a chunk of
4096 kept loci of 200 gains x 6 branches: about 1.3 s against 0.04 s to
write them plainly; the parts take about 2.5x the disk space of the
compressed result meanwhile).

The result is built by a `ResultWriter`: a run hands it each part as soon
as the part is on disk (in any order), it writes the part's slices at their
final place in a temporary file, and `ResultWriter.finish` folds the
chunks' envelopes in variant order and publishes the file. `merge_parts`
does the same from part files. Only one part is in memory at a time, so
the memory does not grow with the number of variants.
"""
from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, NamedTuple

import netCDF4
import numpy as np

from .errors import SweepError

__all__ = [
    "PartError",
    "ENVELOPE_VARS",
    "Var",
    "Part",
    "write_part",
    "read_part",
    "merge_parts",
    "ResultWriter",
    "open_result",
    "result_attrs",
    "result_is_complete",
    "is_result",
    "check_layout",
]

# part-only variables: the envelope's streaming sums, folded into abscissa_* by the merge
ENVELOPE_VARS = ("envelope_min", "envelope_max", "envelope_sum", "envelope_count")

# variables stored as float32 and compressed (DESIGN section 4)
_COMPRESSED = ("locus_real", "locus_imag")
_RESULT_COMPLEVEL = 4
_RESULT_CHUNK_VALUES = 65536  # about 256 KiB of float32 per compressed chunk of the result

_ABSCISSA_ATTRS = {
    "abscissa_min": {"long_name": "smallest spectral abscissa over all variants", "units": "1/s"},
    "abscissa_max": {"long_name": "largest spectral abscissa over all variants", "units": "1/s"},
    "abscissa_mean": {"long_name": "mean spectral abscissa over all variants", "units": "1/s"},
}


class PartError(SweepError):
    """A part file that cannot be used (unreadable, another config, wrong range)."""


# ---------------------------------------------------------------- a chunk in memory


class Var(NamedTuple):
    """One variable of a part: dimension names, values, attributes (``long_name``, ``units``)."""

    dims: tuple[str, ...]
    values: np.ndarray
    attrs: dict[str, Any]


@dataclass
class Part:
    """One chunk's results in memory, as written by `write_part` and returned by `read_part`.

    Attributes
    ----------
    variables
        Name -> `Var`, coordinates and data in one mapping (file order).
    coords
        Names in ``variables`` that are coordinates: the dimension
        coordinates (``variant``, ``gain``, ``locus_variant``) and the
        coordinates along ``variant`` (parameters, ``design``).
    attrs
        Global attributes (``config_sha256``, ``variant_start``, ``variant_stop``, ...).
    """

    variables: dict[str, Var]
    coords: tuple[str, ...]
    attrs: dict[str, Any] = field(default_factory=dict)

    def __contains__(self, name: object) -> bool:
        return name in self.variables

    def __getitem__(self, name: str) -> np.ndarray:
        return self.variables[name].values

    @property
    def sizes(self) -> dict[str, int]:
        """Dimension name -> length (raises `PartError` if two variables disagree)."""
        sizes: dict[str, int] = {}
        for name, var in self.variables.items():
            if len(var.dims) != np.ndim(var.values):
                raise PartError(f"variable {name}: {len(var.dims)} dimension names for {np.ndim(var.values)} axes")
            for d, n in zip(var.dims, np.shape(var.values)):
                if sizes.setdefault(d, int(n)) != n:
                    raise PartError(f"variable {name}: dimension {d} has length {n}, elsewhere {sizes[d]}")
        return sizes

    def aux_coords(self) -> list[str]:
        """Coordinates along ``variant`` that are not ``variant`` itself (parameters, design)."""
        return [c for c in self.coords if c != "variant" and self.variables[c].dims == ("variant",)]

    def to_dataset(self):
        """The part as an `xarray.Dataset` (for inspection and tests)."""
        import xarray as xr

        def triple(v: Var):
            return (v.dims, v.values, dict(v.attrs))

        return xr.Dataset(
            {n: triple(v) for n, v in self.variables.items() if n not in self.coords},
            coords={n: triple(self.variables[n]) for n in self.coords},
            attrs=dict(self.attrs),
        )


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


def _nc_kind(values: np.ndarray):
    return str if values.dtype.kind in "UO" else values.dtype


def _put(v: netCDF4.Variable, values: np.ndarray, index=Ellipsis) -> None:
    if values.size == 0:
        return  # nothing to write (a zero-length dimension is stored as unlimited)
    v[index] = values.astype(object) if values.dtype.kind == "U" else values


_LAYOUT_ATTR = "part_layout"  # global attribute of a part file: how its variables are stored (JSON)


def write_part(part: Part, path: str | os.PathLike) -> Path:
    """Write one chunk's results atomically.

    Variables with the same dimensions and type are stored together as one
    block (a netCDF variable with a leading ``block<k>_member`` dimension),
    the dimension coordinates and text variables on their own; the global
    attribute ``part_layout`` (JSON) names every block's members with their
    dimensions and attributes. A part holds some 45 variables and each
    netCDF variable costs about as much to write as a block of ten, so
    this makes a part several times cheaper to write and read; only
    `read_part` needs to know the layout, and the result keeps the layout
    of DESIGN section 4.

    Parameters
    ----------
    part
        The chunk (see the module docstring for its layout).
    path
        Final name, e.g. ``OUT.parts/chunk-00003.nc``.

    Returns
    -------
    Path
        ``path``.
    """
    path = Path(path)
    tmp = _tmp_name(path)
    sizes = part.sizes
    layout: dict[str, Any] = {
        "order": list(part.variables), "coords": list(part.coords),
        "dims": {n: list(v.dims) for n, v in part.variables.items()},
        "attrs": {n: dict(v.attrs) for n, v in part.variables.items()},
        "blocks": {},
    }
    groups: dict[tuple, list[str]] = {}
    alone: list[str] = []
    for name, var in part.variables.items():
        values = np.asarray(var.values)
        if values.dtype.kind in "UO" or var.dims == (name,):
            alone.append(name)  # text, and the dimension coordinates (found by name, e.g. by merge_parts)
        else:
            groups.setdefault((var.dims, values.dtype.str), []).append(name)
    try:
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
            for dim, n in sizes.items():
                nc.createDimension(dim, n)  # a size of 0 becomes unlimited: still reads as empty
            for name in alone:
                values = np.asarray(part.variables[name].values)
                kind = _nc_kind(values)
                v = nc.createVariable(name, kind, part.variables[name].dims,
                                      fill_value=None if kind is str else False)
                _put(v, values)
            for k, ((dims, dtype), names) in enumerate(groups.items()):
                block, member = f"block{k}", f"block{k}_member"
                nc.createDimension(member, len(names))
                v = nc.createVariable(block, np.dtype(dtype), (member, *dims), fill_value=False)
                _put(v, np.stack([np.asarray(part.variables[n].values) for n in names]))
                layout["blocks"][block] = names
            nc.setncatts({**part.attrs, _LAYOUT_ATTR: json.dumps(layout)})
        _publish(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _plain(value: Any) -> Any:
    """netCDF attribute value -> plain Python scalar where it is one."""
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_part(
    path: str | os.PathLike,
    *,
    config_sha256: str | None = None,
    start: int | None = None,
    stop: int | None = None,
) -> Part:
    """Read a part file into memory and check that it belongs where it is.

    Every variable is read in full, so a damaged file is found here and not
    in the merge.

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
    Part
        The part, loaded (the file is closed).

    Raises
    ------
    PartError
        Unreadable, truncated, another config, or another variant range.
    """
    path = Path(path)
    try:
        with netCDF4.Dataset(path) as nc:
            nc.set_auto_maskandscale(False)
            attrs = {k: _plain(nc.getncattr(k)) for k in nc.ncattrs()}
            _check_attrs(path, attrs, config_sha256, start, stop)
            layout = json.loads(attrs.pop(_LAYOUT_ATTR))
            values: dict[str, np.ndarray] = {}
            for name, v in nc.variables.items():
                data = np.asarray(v[...])
                if name in layout["blocks"]:
                    values.update(zip(layout["blocks"][name], data))
                else:
                    values[name] = data
            variables = {
                n: Var(tuple(layout["dims"][n]), values[n], dict(layout["attrs"][n])) for n in layout["order"]
            }
            part = Part(variables, tuple(layout["coords"]), attrs)
            part.sizes  # noqa: B018  (dimension lengths agree)
    except PartError:
        raise
    except Exception as err:  # any failure to read means "compute it again"
        raise PartError(f"{path.name}: unreadable ({type(err).__name__}: {err})") from None
    p_start, p_stop = int(attrs["variant_start"]), int(attrs["variant_stop"])
    if "variant" not in part or not np.array_equal(part["variant"], np.arange(p_start, p_stop)):
        raise PartError(f"{path.name}: variant coordinate does not match its range")
    missing = [v for v in ENVELOPE_VARS if v not in part]
    if missing:
        raise PartError(f"{path.name}: missing {', '.join(missing)}")
    return part


def _check_attrs(path: Path, attrs: Mapping[str, Any], config_sha256, start, stop) -> None:
    if config_sha256 is not None and attrs.get("config_sha256") != config_sha256:
        raise PartError(f"{path.name}: written for another config")
    try:
        p_start, p_stop = int(attrs["variant_start"]), int(attrs["variant_stop"])
    except (KeyError, TypeError, ValueError):
        raise PartError(f"{path.name}: no variant range") from None
    if (start is not None and p_start != start) or (stop is not None and p_stop != stop):
        raise PartError(f"{path.name}: holds variants {p_start}..{p_stop}, expected {start}..{stop}")


# ---------------------------------------------------------------- result


def result_attrs(config, *, created: str, sweep_version: str) -> dict[str, str | int]:
    """Global attributes of a result file (DESIGN section 4).

    Only the config's contents and library versions: no host, user or path.
    The versions of scipy and xarray are read from the installed package
    metadata (the same strings as their ``__version__``), so writing a
    result does not import them.
    """
    from importlib.metadata import version

    return {
        "title": config.title,
        "config": config.text,
        "config_sha256": config.sha256,
        # netCDF attributes hold 64-bit integers at most: a larger seed is kept, as its digits
        "seed": seed if -2**63 <= (seed := int(config.sweep.seed)) < 2**63 else str(seed),
        "designs": ", ".join(config.sweep.designs),
        "feedback": config.feedback,
        "created": created,
        "sweep_version": sweep_version,
        "numpy_version": np.__version__,
        "scipy_version": version("scipy"),
        "xarray_version": version("xarray"),
        "netCDF4_version": netCDF4.__version__,
    }


def _define(out: netCDF4.Dataset, name: str, var: Var, coords_attr: str | None) -> netCDF4.Variable:
    kind = _nc_kind(var.values)
    if name in _COMPRESSED:
        g = out.dimensions["gain"].size if "gain" in out.dimensions else 1
        b = out.dimensions["branch"].size if "branch" in out.dimensions else 1
        k = out.dimensions["locus_variant"].size if "locus_variant" in out.dimensions else 1
        rows = max(1, min(k, _RESULT_CHUNK_VALUES // max(1, g * b)))
        v = out.createVariable(
            name, np.float32, var.dims, zlib=True, complevel=_RESULT_COMPLEVEL, shuffle=True,
            chunksizes=(rows, max(1, g), max(1, b)), fill_value=False,
        )
    else:
        v = out.createVariable(name, kind, var.dims, fill_value=None if kind is str else False)
    attrs = {k: val for k, val in var.attrs.items() if not k.startswith("_") and k != "coordinates"}
    if coords_attr:
        attrs["coordinates"] = coords_attr
    v.setncatts(attrs)
    return v


def check_layout(first: Part, part: Part, name: str, hint: str = "") -> None:
    """A part must hold the same variables, with the same dimensions and widths, as ``first``.

    Raises
    ------
    PartError
        Naming ``name`` and the first difference found, then ``hint``.
    """
    if list(part.variables) != list(first.variables):
        raise PartError(f"{name}: holds other variables than the other parts{hint}")
    for vname, var in part.variables.items():
        ref = first.variables[vname]
        if var.dims != ref.dims or any(
            d not in ("variant", "locus_variant") and a != b
            for d, a, b in zip(var.dims, np.shape(var.values), np.shape(ref.values))
        ):
            raise PartError(f"{name}: variable {vname} has another shape than in the other parts{hint}")


class ResultWriter:
    """Builds the result file from parts that arrive in any order, then publishes it.

    The file is written under a temporary name beside ``out_path``; each
    `add` writes one part's slices at their final place (variants by index,
    kept loci by their rank among all kept variants), so a run can merge
    every chunk as soon as it is computed and the end of the run only
    folds the envelopes and renames the file. Memory holds one part at a
    time plus four ``(G,)`` envelope arrays per chunk.

    Parameters
    ----------
    out_path
        The result file.
    total
        Number of variants of the whole sweep.
    kept
        Sorted global indices of the variants whose locus is kept.
    """

    def __init__(self, out_path: str | os.PathLike, *, total: int, kept: np.ndarray):
        self.out_path = Path(out_path)
        self.tmp = _tmp_name(self.out_path)
        self.total = int(total)
        self.kept = np.asarray(kept, dtype=np.int64)
        self._nc: netCDF4.Dataset | None = None
        self._first: Part | None = None
        self._names: list[str] = []
        self._envelopes: dict[int, tuple[int, tuple[np.ndarray, ...]]] = {}  # start -> (stop, arrays)
        self.added = 0

    def _create(self, part: Part) -> None:
        nc = netCDF4.Dataset(self.tmp, "w", format="NETCDF4")
        self._nc = nc
        for dim, size in part.sizes.items():
            n = {"variant": self.total, "locus_variant": self.kept.size}.get(dim, size)
            nc.createDimension(dim, n)  # a size of 0 becomes unlimited: still reads as empty
        aux = " ".join(part.aux_coords())
        self._names = list(part.coords) + [
            n for n in part.variables if n not in part.coords and n not in ENVELOPE_VARS
        ]
        for name in self._names:
            var = part.variables[name]
            _define(nc, name, var, aux if (name not in part.coords and "variant" in var.dims) else None)
        for name, a in _ABSCISSA_ATTRS.items():
            nc.createVariable(name, np.float64, ("gain",), fill_value=False).setncatts(a)
        self._first = part

    def add(self, part: Part, name: str = "part") -> None:
        """Write one part into the result.

        Parameters
        ----------
        part
            A part with attributes ``variant_start`` and ``variant_stop``.
        name
            What to call the part in error messages (its file name).

        Raises
        ------
        PartError
            Laid out unlike the first part, outside the sweep, or its kept
            loci are not the ones expected there.
        """
        a, b = int(part.attrs["variant_start"]), int(part.attrs["variant_stop"])
        if not 0 <= a <= b <= self.total:
            raise PartError(f"{name}: variants {a}..{b} outside the sweep of {self.total}")
        if a in self._envelopes:
            raise PartError(f"{name}: variants from {a} were already merged")
        if self._nc is None:
            self._create(part)
        else:
            check_layout(self._first, part, name,
                         "; remove the parts folder and run again (written by another version of sweep?)")
        k0 = int(np.searchsorted(self.kept, a))
        lv = part["locus_variant"] if "locus_variant" in part else np.zeros(0, np.int64)
        if not np.array_equal(self.kept[k0:k0 + lv.size], lv) or (
                lv.size != int(np.searchsorted(self.kept, b)) - k0):
            raise PartError(f"{name}: its kept loci are not the ones chosen for variants {a}..{b - 1}")
        nc = self._nc
        for vname in self._names:
            var = part.variables[vname]
            if "variant" in var.dims:
                _put(nc[vname], var.values, slice(a, b))
            elif "locus_variant" in var.dims:
                _put(nc[vname], var.values, slice(k0, k0 + lv.size))
            elif self.added == 0:
                _put(nc[vname], var.values)
        self._envelopes[a] = (b, tuple(np.asarray(part[v]) for v in ENVELOPE_VARS))
        self.added += 1
        if lv.size:
            # compress the kept loci now: HDF5 would otherwise hold them in its chunk cache and
            # compress them all when the file is closed, in the run's last, serial step
            nc.sync()

    def finish(self, attrs: Mapping[str, object]) -> Path:
        """Fold the envelopes in variant order, set the global attributes, publish the file.

        Raises
        ------
        PartError
            The parts added do not tile ``0 .. total``.
        """
        from .locus import Envelope

        if self._nc is None:
            raise SweepError("no parts to merge")
        env, expect = None, 0
        for a in sorted(self._envelopes):  # a fixed order: the sums (and the mean) do not depend on arrival
            if a != expect:
                raise PartError(f"the parts do not tile the sweep: variants from {expect} are missing")
            b, arrays = self._envelopes[a]
            part_env = Envelope.from_arrays(*arrays)
            env = part_env if env is None else env.merge(part_env)
            expect = b
        if expect != self.total:
            raise PartError(f"the parts do not tile the sweep: variants from {expect} are missing")
        nc = self._nc
        nc["abscissa_min"][:] = env.min
        nc["abscissa_max"][:] = env.max
        nc["abscissa_mean"][:] = env.mean
        nc.setncatts(dict(attrs))
        nc.close()
        self._nc = None
        _publish(self.tmp, self.out_path)
        return self.out_path

    def sync(self) -> None:
        """Flush what has been written so far (for the kill tests)."""
        if self._nc is not None:
            self._nc.sync()

    def abort(self) -> None:
        """Close and delete the temporary file (the parts stay)."""
        if self._nc is not None:
            try:
                self._nc.close()
            except Exception:
                pass
            self._nc = None
        if self.tmp.exists():
            self.tmp.unlink()


def merge_parts(
    part_paths: Iterable[str | os.PathLike],
    out_path: str | os.PathLike,
    attrs: Mapping[str, object],
    *,
    _after_part: Callable[[int], None] | None = None,
) -> Path:
    """Merge part files (contiguous variant ranges, in chunk order) into one result.

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

    Raises
    ------
    PartError
        A part is unreadable, out of order, or laid out unlike the first.
    """
    paths = [Path(p) for p in part_paths]
    if not paths:
        raise SweepError("no parts to merge")
    # pass 1: headers and kept indices only, to size the dimensions and check the tiling
    total, kept, ranges = 0, [], []
    for p in paths:
        try:
            with netCDF4.Dataset(p) as nc:
                a, b = int(nc.getncattr("variant_start")), int(nc.getncattr("variant_stop"))
                if "locus_variant" in nc.variables:
                    kept.append(np.asarray(nc["locus_variant"][:], dtype=np.int64))
        except Exception as err:
            raise PartError(f"{p.name}: unreadable ({type(err).__name__}: {err})") from None
        if a != total:
            raise PartError(f"{p.name}: starts at variant {a}, expected {total}")
        ranges.append((a, b))
        total = b
    writer = ResultWriter(out_path, total=total, kept=np.concatenate(kept) if kept else np.zeros(0, np.int64))
    try:
        for i, p in enumerate(paths):
            writer.add(read_part(p, start=ranges[i][0], stop=ranges[i][1]), p.name)
            if _after_part is not None:
                writer.sync()
                _after_part(i + 1)
        return writer.finish(attrs)
    finally:
        writer.abort()


def open_result(path: str | os.PathLike):
    """Open a result file (lazily) with plain xarray.

    Parameters
    ----------
    path
        A file written by `merge_parts`.

    Returns
    -------
    xarray.Dataset
    """
    import xarray as xr

    return xr.open_dataset(Path(path), engine="netcdf4")


def is_result(path: str | os.PathLike) -> bool:
    """True if ``path`` is a readable result file of sweep (any config, any version).

    A run replaces such a file, and refuses to replace anything else.
    """
    try:
        with netCDF4.Dataset(Path(path)) as nc:
            return {"config_sha256", "sweep_version"} <= set(nc.ncattrs())
    except Exception:
        return False


def result_is_complete(path: str | os.PathLike, *, config_sha256: str, sweep_version: str) -> bool:
    """True if ``path`` is a readable result of this config written by this sweep version."""
    try:
        with netCDF4.Dataset(Path(path)) as nc:
            return (nc.getncattr("config_sha256") == config_sha256
                    and nc.getncattr("sweep_version") == sweep_version)
    except Exception:
        return False


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
