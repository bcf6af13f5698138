"""Running a sweep: chunks, parallel execution, resume, lock, log and progress.

`run` turns a `Config` into a result file. The variants (`sweep.designs`)
are cut into fixed chunks of ``config.sweep.chunk_size``; chunk ``i`` always
holds variants ``i*chunk_size ... (i+1)*chunk_size - 1``. Each chunk is
computed by ONE pure function, `compute_chunk`, and written by the parent
process as its own part file ``OUT.parts/chunk-00000.nc ...``; when all parts
exist they are merged into ``OUT`` (`sweep.store.merge_parts`) and, only
after the merge has succeeded, the parts folder is deleted.

Files next to ``OUT``:

``OUT.parts/manifest.json``
    config sha256, number of variants, chunk size, sweep version, the gain
    grid and the kept-locus variant indices. Both are computed once per run
    (from the nominal and over the whole sweep) and reused exactly by a
    resumed run.
``OUT.lock``
    pid and start time of the run that owns ``OUT``. A second run is refused
    while that process is alive; a lock whose process no longer exists (or
    whose pid now belongs to a process started at another time) is stale and
    taken over, with a line in the log.
``OUT.log``
    plain text, appended: start, config hash, each chunk with its time,
    merge, end and totals.

A rerun (with or without ``resume=True``) checks every existing part (it
must be readable, carry this config's sha256 and hold exactly its chunk's
variants) and computes only the missing or bad ones. A parts folder written
for another config is refused. If ``OUT`` is already complete for this
config (same sha256, no parts folder) the run returns it without work.

Test hook (for the kill-and-resume tests only, never needed in use): the
environment variable ``SWEEP_TEST_PAUSE`` = ``chunks:N`` makes the run write
``test pause`` to the log and sleep after it has written N parts in this
process (``chunks:0``: right after start), ``merge:K`` after K parts have
been appended to the merged file, so a test can kill it at that moment.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np
import xarray as xr

from . import __version__, designs, store
from .config import Config
from .designs import Variants
from .errors import InputError, SweepError

__all__ = ["run", "compute_chunk", "Interrupted", "LockError", "nominal_gains", "kept_mask"]

MANIFEST = "manifest.json"
# dataset names a parameter may not take (DESIGN section 4)
RESERVED = {
    "variant", "boundary", "pole", "zero", "breakaway", "gain", "branch", "locus_variant", "design",
    "locus_real", "locus_imag", "abscissa_min", "abscissa_max", "abscissa_mean", *store.ENVELOPE_VARS,
}


class Interrupted(SweepError):
    """The run was stopped (Ctrl-C); finished parts are kept.

    Attributes
    ----------
    resume_command
        The command line that continues the run.
    """

    def __init__(self, message: str, resume_command: str):
        self.resume_command = resume_command
        super().__init__(f"{message}; resume with: {resume_command}")


class LockError(SweepError):
    """Another live run owns the output."""


# ---------------------------------------------------------------- time, log


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


class _Log:
    """Append-only plain-text log, one line per event, flushed at once."""

    def __init__(self, path: Path):
        self.path = path

    def __call__(self, text: str) -> None:
        with open(self.path, "a", encoding="utf-8") as fh:
            fh.write(f"{_now()} {text}\n")


# ---------------------------------------------------------------- lock


def _proc_start(pid: int) -> str | None:
    """Start time of a process in clock ticks since boot (Linux), for pid-reuse detection."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read().decode(errors="replace")
        return stat.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def _alive(pid: int, start: str | None) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    now = _proc_start(pid)
    if start is not None and now is not None and now != start:
        return False  # the pid was reused by another process
    if now is None and os.path.exists("/proc/self/stat"):
        return False  # /proc works but the process has gone (or is a zombie being reaped)
    try:  # a zombie (killed, not yet reaped) holds nothing
        with open(f"/proc/{pid}/stat", "rb") as fh:
            if fh.read().decode(errors="replace").rsplit(")", 1)[1].split()[0] == "Z":
                return False
    except (OSError, IndexError):
        pass
    return True


class _Lock:
    def __init__(self, path: Path, log: _Log):
        self.path, self.log, self.owned = path, log, False

    def __enter__(self) -> "_Lock":
        me = {"pid": os.getpid(), "proc_start": _proc_start(os.getpid()), "started": _now()}
        for _ in range(5):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    held = json.loads(self.path.read_text())
                    pid = int(held["pid"])
                except (OSError, ValueError, KeyError, TypeError):
                    held, pid = {}, -1  # unreadable lock (a crash while writing it): stale
                if pid > 0 and _alive(pid, held.get("proc_start")):
                    raise LockError(
                        f"{self.path.name}: another run (pid {pid}, started {held.get('started', '?')}) "
                        "is writing this output; wait for it or choose another -o"
                    ) from None
                self.log(f"taking over stale lock of pid {pid} (started {held.get('started', '?')})")
                try:
                    self.path.unlink()
                except FileNotFoundError:
                    pass
                continue
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
                fh.flush()
                os.fsync(fh.fileno())
            self.owned = True
            return self
        raise LockError(f"{self.path.name}: could not take the lock; remove it if no run is active")

    def __exit__(self, *exc) -> None:
        if not self.owned:
            return
        try:
            if int(json.loads(self.path.read_text())["pid"]) == os.getpid():
                self.path.unlink()
        except (OSError, ValueError, KeyError):
            pass


# ---------------------------------------------------------------- test hook


def _pause_hook(kind: str, log: _Log) -> Callable[[int], None]:
    """Returns f(n): sleeps for a test when SWEEP_TEST_PAUSE == f"{kind}:{n}"."""
    spec = os.environ.get("SWEEP_TEST_PAUSE", "")
    want = None
    if spec.startswith(kind + ":"):
        try:
            want = int(spec.split(":", 1)[1])
        except ValueError:
            want = None

    def hook(n: int) -> None:
        if want is not None and n == want:
            log(f"test pause {kind}:{n}")
            time.sleep(3600)

    return hook


# ---------------------------------------------------------------- per-run data


def _check_names(config: Config) -> None:
    analysis_names: set[str] = set()
    try:
        from . import analysis

        analysis_names = set(getattr(analysis, "VARIABLE_DIMS", {}))
    except ImportError:
        pass
    for p in config.parameters:
        if p.name in RESERVED or p.name in analysis_names:
            raise InputError(
                f"parameter name '{p.name}' is also a name in the result file; rename the parameter",
                file=config.source,
                field=f"parameters.{p.name}",
            )


def nominal_gains(config: Config) -> np.ndarray:
    """The common locus gain grid of the run, built around the nominal.

    The nominal's boundary gains and the operating gain lie on the grid
    (`sweep.locus.gain_grid`).

    Returns
    -------
    ndarray
        ``(config.locus.points,)`` strictly increasing gains.
    """
    from . import analysis, locus, loop

    N, D = loop.assemble(config, config.nominal_values())
    res = analysis.analyze_stack(
        N, D, sigma=config.sigma, gain_range=config.gain_range, operating_gain=config.operating_gain
    )
    bg = np.asarray(res["boundary_gain"][0], dtype=float)
    bg = bg[np.isfinite(bg)]
    return np.asarray(
        locus.gain_grid(
            config.locus.points, config.gain_range, nominal_N=N, nominal_D=D, sigma=config.sigma,
            boundary_gains=tuple(bg), operating_gain=config.operating_gain,
        ),
        dtype=float,
    )


def kept_mask(config: Config, variants: Variants) -> np.ndarray:
    """Which variants of the whole sweep keep their locus (bool ``(V,)``), chosen once per run."""
    from . import locus

    idx = locus.kept_indices(
        variants.count, config.locus.keep, config.locus.keep_count, config.sweep.seed, variants.design
    )
    mask = np.zeros(variants.count, dtype=bool)
    mask[np.asarray(idx, dtype=np.int64)] = True
    return mask


def _coords(config: Config, variants: Variants, gains: np.ndarray, kept: np.ndarray) -> dict[str, Any]:
    units = {p.name: p.units for p in config.parameters}
    coords: dict[str, Any] = {
        "variant": ("variant", variants.index, {"long_name": "variant index", "units": "1"}),
    }
    for name, vals in variants.values.items():
        coords[name] = ("variant", vals, {"long_name": f"parameter {name}", "units": units.get(name, "") or "1"})
    coords["design"] = ("variant", variants.design.astype(str), {"long_name": "design that produced the variant", "units": ""})
    coords["gain"] = ("gain", gains, {"long_name": "loop gain k on the common locus grid", "units": "1"})
    coords["locus_variant"] = (
        "locus_variant", variants.index[kept], {"long_name": "variant whose locus is kept", "units": "1"},
    )
    return coords


def compute_chunk(config: Config, variants: Variants, gains: np.ndarray, kept: np.ndarray) -> xr.Dataset:
    """Everything computed for one chunk of variants, as a part dataset.

    Pure: no files. Assembles the stacks (`sweep.loop.assemble`), analyses
    them (`sweep.analysis.analyze_stack`), traces the loci on the common
    grid (`sweep.locus.trace`), keeps the loci of the kept variants and the
    chunk's spectral-abscissa envelope.

    Parameters
    ----------
    config
        The run's config.
    variants
        The chunk (``variants.start`` is its first global index).
    gains
        The run's gain grid ``(G,)``.
    kept
        Bool ``(V,)``: which of the chunk's variants keep their locus.

    Returns
    -------
    xarray.Dataset
        The part layout described in `sweep.store`.
    """
    from . import analysis, locus, loop

    N, D = loop.assemble(config, variants.values)
    # The grid holds the operating gain exactly, so the traced roots there are the
    # closed-loop poles, and the branches start at the open-loop poles: the analysis
    # need not solve those eigenproblems again.
    op_index = None
    if config.operating_gain is not None:
        at = np.flatnonzero(gains == config.operating_gain)
        op_index = int(at[0]) if at.size else None
    traced = locus.trace_chunk(N, D, sigma=config.sigma, gains=gains, keep=kept, operating_index=op_index)
    closed = traced.operating_roots
    if closed is not None and not np.all(np.isfinite(closed)):
        closed = None
    res = analysis.analyze_stack(
        N, D, sigma=config.sigma, gain_range=config.gain_range, operating_gain=config.operating_gain,
        open_loop_poles=traced.open_loop_poles, closed_loop_poles=closed,
    )
    data: dict[str, Any] = {}
    for name, dims in analysis.VARIABLE_DIMS.items():
        if name in res:
            data[name] = (tuple(dims), np.asarray(res[name]), dict(analysis.VARIABLE_ATTRS[name]))
    data.update(_locus_vars(traced))
    return xr.Dataset(data, coords=_coords(config, variants, gains, kept))


def _locus_vars(traced) -> dict[str, Any]:
    """Kept loci (float32) and the chunk's envelope arrays, from a `sweep.locus.ChunkLocus`."""
    dims = ("locus_variant", "gain", "branch")
    k = traced.kept_roots
    out: dict[str, Any] = {
        "locus_real": (dims, k.real.astype(np.float32), {"long_name": "real part of closed-loop root", "units": "1/s"}),
        "locus_imag": (dims, k.imag.astype(np.float32), {"long_name": "imaginary part of closed-loop root", "units": "rad/s"}),
    }
    for name, arr in traced.envelope.to_arrays().items():
        out[name] = ("gain", arr, {"long_name": f"chunk {name.split('_')[1]} of spectral abscissa", "units": "1/s"})
    return out


def _chunk_task(fn: Callable, config: Config, i: int, variants: Variants, gains: np.ndarray,
                kept: np.ndarray) -> tuple[int, xr.Dataset, float]:
    t0 = time.perf_counter()
    ds = fn(config, variants, gains, kept)
    return i, ds, time.perf_counter() - t0


# ---------------------------------------------------------------- manifest


def _write_json(path: Path, obj: dict) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(obj, fh, indent=1)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    store._fsync_dir(path.parent)


def _manifest(config: Config, out: Path, parts: Path, variants: Variants, log: _Log) -> dict:
    path = parts / MANIFEST
    if parts.exists() and path.exists():
        try:
            man = json.loads(path.read_text())
        except (OSError, ValueError):
            man = None
        if man is not None:
            if man.get("config_sha256") != config.sha256:
                raise InputError(
                    f"{parts} belongs to another config (sha256 {str(man.get('config_sha256'))[:12]}...);"
                    " remove that folder or choose another -o",
                    file=config.source,
                )
            if (man.get("variants"), man.get("chunk_size")) != (variants.count, config.sweep.chunk_size):
                raise InputError(
                    f"{parts} was made with another variant count or chunk size (sweep version"
                    f" {man.get('sweep_version')}); remove that folder or choose another -o",
                    file=config.source,
                )
            log(f"resuming from {parts.name}")
            return man
        log(f"{MANIFEST} unreadable; starting the parts again")
        shutil.rmtree(parts)
    parts.mkdir(parents=True, exist_ok=True)
    gains = nominal_gains(config)
    mask = kept_mask(config, variants)
    man = {
        "config_sha256": config.sha256,
        "variants": variants.count,
        "chunk_size": int(config.sweep.chunk_size),
        "chunks": math.ceil(variants.count / config.sweep.chunk_size),
        "sweep_version": __version__,
        "gains": [float(g) for g in gains],  # json writes repr(float): exact round trip
        "kept": [int(i) for i in np.flatnonzero(mask)],
    }
    _write_json(path, man)
    return man


def _remove_leftovers(out: Path, parts: Path, log: _Log) -> None:
    """Delete temporary files of killed runs (we hold the lock, so none is being written)."""
    found = list(out.parent.glob(f".{out.name}.tmp-*"))
    if parts.exists():
        found += list(parts.glob(".*.tmp-*"))
    for f in found:
        try:
            f.unlink()
            log(f"removed leftover {f.name}")
        except OSError:
            pass


def _part_path(parts: Path, i: int) -> Path:
    return parts / f"chunk-{i:05d}.nc"


def _resume_command(config: Config, out: Path) -> str:
    import shlex

    return f"sweep run {shlex.quote(str(config.source))} -o {shlex.quote(str(out))} --resume"


# ---------------------------------------------------------------- execution


def _iter_local(fn, config, tasks, n_tasks, jobs) -> Iterator[tuple[int, xr.Dataset, float]]:
    if jobs == 1 or n_tasks <= 1:
        for i, vs, g, k in tasks:
            yield _chunk_task(fn, config, i, vs, g, k)
        return
    import joblib

    par = joblib.Parallel(n_jobs=jobs, return_as="generator_unordered")
    yield from par(joblib.delayed(_chunk_task)(fn, config, i, vs, g, k) for i, vs, g, k in tasks)


def _iter_dask(fn, config, tasks, scheduler) -> Iterator[tuple[int, xr.Dataset, float]]:
    from distributed import Client, as_completed

    client = Client(scheduler)  # as_completed finds its client as the default one
    futures = []
    try:
        futures = [client.submit(_chunk_task, fn, config, i, vs, g, k, pure=False) for i, vs, g, k in tasks]
        for fut in as_completed(futures):
            if fut.status == "error":
                fut.result()  # re-raises the worker's own exception
            yield fut.result()
            fut.release()
    finally:
        for f in futures:
            f.cancel()
        client.close()


def run(
    config: Config,
    *,
    out: str | os.PathLike | None = None,
    jobs: int | None = None,
    resume: bool = False,
    scheduler: str | None = None,
    quiet: bool = False,
) -> Path:
    """Run the sweep and write the result file.

    Parameters
    ----------
    config
        A validated config (`sweep.config.load_config`).
    out
        Result file; default ``results/<config stem>.nc``.
    jobs
        Local processes (joblib); ``None``: all cores, ``1``: in this process.
        Ignored when ``scheduler`` is given.
    resume
        Continue an earlier run. A plain rerun does the same (finished, valid
        parts are always reused); the flag is accepted for clarity.
    scheduler
        Address ``tcp://HOST:PORT`` of a Dask distributed scheduler: its
        workers compute the chunks, this process writes the parts.
    quiet
        No progress bar.

    Returns
    -------
    Path
        The result file.

    Raises
    ------
    InputError
        The parts folder belongs to another config, or a parameter name clashes.
    LockError
        Another live run writes the same output.
    Interrupted
        Ctrl-C; finished parts are kept and the message holds the resume command.
    """
    from tqdm import tqdm

    out = Path(out) if out is not None else Path("results") / f"{config.stem}.nc"
    out.parent.mkdir(parents=True, exist_ok=True)
    parts = out.with_name(out.name + ".parts")
    log = _Log(out.with_name(out.name + ".log"))
    _check_names(config)
    variants = designs.generate(config)
    jobs = (os.cpu_count() or 1) if jobs is None else max(1, int(jobs))

    with _Lock(out.with_name(out.name + ".lock"), log):
        t_start = time.perf_counter()
        log(f"start {config.source} sha256={config.sha256} variants={variants.count} "
            f"chunk_size={config.sweep.chunk_size} jobs={jobs if scheduler is None else 'dask'} "
            f"resume={bool(resume)} sweep={__version__}")
        if not parts.exists() and out.exists() and _complete(out, config):
            log("output already complete for this config; nothing to do")
            return out
        _remove_leftovers(out, parts, log)
        man = _manifest(config, out, parts, variants, log)
        gains = np.asarray(man["gains"], dtype=float)
        mask = np.zeros(variants.count, dtype=bool)
        mask[np.asarray(man["kept"], dtype=np.int64)] = True
        size = int(man["chunk_size"])
        n_chunks = int(man["chunks"])
        ranges = [(i * size, min((i + 1) * size, variants.count)) for i in range(n_chunks)]

        todo, done_variants = [], 0
        for i, (a, b) in enumerate(ranges):
            p = _part_path(parts, i)
            if p.exists():
                try:
                    store.read_part(p, config_sha256=config.sha256, start=a, stop=b).close()
                    done_variants += b - a
                    continue
                except store.PartError as err:
                    log(f"chunk {i}: {err}; computing it again")
                    p.unlink()
            todo.append(i)
        log(f"chunks: {n_chunks} total, {n_chunks - len(todo)} valid on disk, {len(todo)} to compute")

        pause = _pause_hook("chunks", log)
        pause(0)
        fn = compute_chunk  # looked up now, so a replaced module attribute is used
        bar = tqdm(total=variants.count, initial=done_variants, unit="variant",
                   disable=quiet, file=sys.stderr, desc="sweep", dynamic_ncols=True)
        written = 0
        try:
            # chunk arguments are cut lazily, so only the chunks in flight are copied
            tasks = ((i, variants.slice(*ranges[i]), gains, mask[slice(*ranges[i])]) for i in todo)
            it = _iter_dask(fn, config, tasks, scheduler) if scheduler else _iter_local(fn, config, tasks, len(todo), jobs)
            for i, ds, seconds in it:
                a, b = ranges[i]
                ds.attrs.update({"config_sha256": config.sha256, "variant_start": a, "variant_stop": b, "chunk": i})
                store.write_part(ds, _part_path(parts, i))
                written += 1
                log(f"chunk {i} variants {a}..{b - 1} computed in {seconds:.3f} s")
                bar.update(b - a)
                bar.set_postfix_str(f"chunk {n_chunks - len(todo) + written}/{n_chunks}")
                pause(written)
        except KeyboardInterrupt:
            bar.close()
            kept_parts = sum(_part_path(parts, i).exists() for i in range(n_chunks))
            log(f"interrupted; {kept_parts}/{n_chunks} chunks kept")
            raise Interrupted(f"interrupted; {kept_parts}/{n_chunks} chunks kept",
                              _resume_command(config, out)) from None
        except BaseException as err:
            bar.close()
            log(f"failed: {type(err).__name__}: {err}; finished parts kept")
            raise
        bar.close()

        log("merge start")
        t_merge = time.perf_counter()
        merge_pause = _pause_hook("merge", log)
        try:
            store.merge_parts(
                [_part_path(parts, i) for i in range(n_chunks)], out,
                store.result_attrs(config, created=_now(), sweep_version=__version__),
                _after_part=lambda k: merge_pause(k),
            )
        except KeyboardInterrupt:
            log("interrupted during merge; parts kept")
            raise Interrupted("interrupted during the merge; all parts kept", _resume_command(config, out)) from None
        shutil.rmtree(parts)  # only after the merged file is in place
        total = time.perf_counter() - t_start
        log(f"end {out.name}: {variants.count} variants in {n_chunks} chunks, computed {written} now, "
            f"merge {time.perf_counter() - t_merge:.3f} s, total {total:.3f} s")
    return out


def _complete(out: Path, config: Config) -> bool:
    try:
        with xr.open_dataset(out, engine="netcdf4") as ds:
            return ds.attrs.get("config_sha256") == config.sha256 and ds.attrs.get("sweep_version") == __version__
    except Exception:
        return False
