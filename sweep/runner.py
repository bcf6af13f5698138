"""Running a sweep: chunks, parallel execution, resume, lock, log and progress.

`run` turns a `Config` into a result file. The variants (`sweep.designs`)
are cut into fixed chunks of ``config.sweep.chunk_size``; chunk ``i`` always
holds variants ``i*chunk_size ... (i+1)*chunk_size - 1``. Each chunk is
computed by ONE pure function, `compute_chunk`, and written as its own part
file ``OUT.parts/chunk-00000.nc ...``; each part is merged into the result
as soon as it is written, the result is published as ``OUT`` once all are
in and, only then, the parts folder is deleted.

Who computes and who writes (``-j N``): this process and ``N - 1`` local
workers (joblib's loky process executor) run the same loop over the list
of missing chunks: claim the next free chunk (an exclusive claim file),
compute it, write its part. Each writes the parts it computes, so neither
the writing nor the transfer of results goes through one process, and no
process waits for another to hand out work. This process reads the
workers' parts back between its own chunks and merges every part into the
result as soon as it exists (`sweep.store.ResultWriter`), so the end of
the run only publishes the file. The workers start first thing (forked
when that is safe, see `_start_method`, else as fresh interpreters) and
load what they need while this process sets the run up. With a Dask scheduler
the cluster's workers compute and this process writes every part (the
workers may not see this file system).

Files next to ``OUT``:

``OUT.parts/manifest.json``
    config sha256, number of variants, chunk size, sweep version, the gain
    grid and the kept-locus variant indices. Both are computed once per run
    (from the nominal and over the whole sweep) and reused exactly by a
    resumed run.
``OUT.parts/.run-ID``, ``OUT.parts/.claim-ID-NNNNN``
    which chunks the processes of the running run have taken (see above).
``OUT.lock``
    pid and start time of the run that owns ``OUT``. A second run is refused
    while that process is alive; a lock whose process no longer exists (or
    whose pid now belongs to a process started at another time) is stale and
    taken over, with a line in the log.
``OUT.log``
    plain text, appended: start, config hash, set-up time, each chunk with
    its compute, write and merge times (and which worker computed it), the
    final merge step, end and totals.

A rerun (with or without ``resume=True``) checks every existing part (it
must be readable, carry this config's sha256, hold exactly its chunk's
variants with this run's parameter values, gain grid and kept loci, and
have been computed by this code: `CODE_SHA256`) and computes only the
missing or bad ones. Parts of other code (an upgrade in the middle of a
run) are refused, and kept. A parts folder written for another
config is refused; an unreadable manifest is written again (the parts are
checked against it). If ``OUT`` is already complete for this config (same
sha256 and sweep version) the run returns it without work, removing a parts
folder left by a run stopped after its merge.

Test hook (for the kill-and-resume tests only, never needed in use): the
environment variable ``SWEEP_TEST_PAUSE`` = ``chunks:N`` makes the run write
``test pause`` to the log and sleep after it has written N parts in this
process (``chunks:0``: right after start), ``merge:K`` after K parts have
been appended to the merged file, ``cleanup:0`` once the merged file is in
place but before the parts folder is removed, so a test can kill it at that
moment.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import sys
import time
from collections import deque
from concurrent.futures.process import BrokenProcessPool  # loky's errors for a dead worker derive from it
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__, designs, store
from .config import Config
from .designs import Variants
from .errors import InputError, SweepError

__all__ = ["run", "compute_chunk", "Interrupted", "LockError", "nominal_gains", "kept_mask", "check_names"]

MANIFEST = "manifest.json"
# dataset names a parameter may not take (DESIGN section 4)
RESERVED = {
    "variant", "boundary", "pole", "zero", "breakaway", "gain", "branch", "locus_variant", "design",
    "locus_real", "locus_imag", "abscissa_min", "abscissa_max", "abscissa_mean", *store.ENVELOPE_VARS,
}


# the modules whose code decides a part's numbers (the loop's coefficients, the analysis, the locus); a
# part's layout is checked on its own (`store.check_layout`)
_COMPUTING_MODULES = ("expressions", "polynomials", "loop", "rootfind", "routh", "analysis", "_analysis_kernel",
                      "locus", "_locus_kernel")


def _code_sha256() -> str:
    """sha256 of the sources of `_COMPUTING_MODULES`, read when this module is imported.

    The manifest and every part record the code that computed them
    (``code_sha256``): a run is resumed only by the same code (after an
    upgrade or an edit of the installed copy it is refused and its parts
    kept, since a mix of two versions' numbers would equal neither run), a
    stray part made by other code is computed again, and a Dask cluster
    whose workers run other code is refused. Modules that only read
    results (query, plots, ...) are left out: changing them keeps the parts.
    """
    import hashlib

    h = hashlib.sha256()
    folder = Path(__file__).resolve().parent
    for name in _COMPUTING_MODULES:
        h.update(name.encode() + b"\0" + (folder / f"{name}.py").read_bytes() + b"\0")
    return h.hexdigest()


CODE_SHA256 = _code_sha256()


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
        try:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(f"{_now()} {text}\n")
        except OSError:
            pass  # a full disk must not hide the run's own error (or stop a run) behind the log's


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

    def _create(self, me: dict) -> bool:
        """Create the lock file holding ``me``, all at once; False if it exists.

        The lock appears with its contents (written under a temporary name,
        then hard-linked to the lock's name, which fails if that exists), so
        another run never reads an empty lock and takes it for a stale one.
        File systems without hard links get an exclusive create and a write.
        """
        tmp = self.path.with_name(f".{self.path.name}.tmp-{os.getpid()}")
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(me, fh)
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.link(tmp, self.path)
        except FileExistsError:
            return False
        except OSError:  # no hard links here
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                return False
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
                fh.flush()
                os.fsync(fh.fileno())
        finally:
            tmp.unlink(missing_ok=True)  # (a run that holds the lock removes leftovers of killed ones)
        return True

    def __enter__(self) -> "_Lock":
        me = {"pid": os.getpid(), "proc_start": _proc_start(os.getpid()), "started": _now()}
        for _ in range(5):
            if not self._create(me):
                try:
                    text = self.path.read_bytes()
                    held = json.loads(text)
                    pid = int(held["pid"])
                except FileNotFoundError:
                    continue  # its run has just ended
                except (OSError, ValueError, KeyError, TypeError):
                    held, pid = {}, -1  # unreadable lock (a damaged file): stale
                if pid > 0 and _alive(pid, held.get("proc_start")):
                    raise LockError(
                        f"{self.path.name}: another run (pid {pid}, started {held.get('started', '?')}) "
                        "is writing this output; wait for it or choose another -o"
                    ) from None
                try:
                    if self.path.read_bytes() != text:
                        continue  # another run has just taken it over: look again
                    self.path.unlink()
                except FileNotFoundError:
                    continue
                self.log(f"taking over stale lock of pid {pid} (started {held.get('started', '?')})")
                continue
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


def check_names(config: Config) -> None:
    """Refuse a parameter named like a dimension or variable of the result file.

    Raises
    ------
    InputError
        Naming the parameter; `sweep check` calls this too, so a config that
        passes `check` also starts.
    """
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

    N, D = loop.assemble(config, config.nominal_values(), count=1)
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


def _coords(config: Config, variants: Variants, gains: np.ndarray, kept: np.ndarray) -> dict[str, store.Var]:
    units = {p.name: p.units for p in config.parameters}
    V = store.Var
    coords: dict[str, store.Var] = {
        "variant": V(("variant",), variants.index, {"long_name": "variant index", "units": "1"}),
    }
    for name, vals in variants.values.items():
        coords[name] = V(("variant",), vals, {"long_name": f"parameter {name}", "units": units.get(name, "") or "1"})
    coords["design"] = V(("variant",), variants.design.astype(str),
                         {"long_name": "design that produced the variant", "units": ""})
    coords["gain"] = V(("gain",), gains, {"long_name": "loop gain k on the common locus grid", "units": "1"})
    coords["locus_variant"] = V(
        ("locus_variant",), variants.index[kept], {"long_name": "variant whose locus is kept", "units": "1"},
    )
    return coords


def compute_chunk(config: Config, variants: Variants, gains: np.ndarray, kept: np.ndarray) -> store.Part:
    """Everything computed for one chunk of variants, as a part.

    Pure: no files. Assembles the stacks (`sweep.loop.assemble`), traces the
    loci on the common grid (`sweep.locus.trace_chunk`: kept branches, roots
    at the operating gain, open-loop poles, the chunk's spectral-abscissa
    envelope) and analyses the stacks (`sweep.analysis.analyze_stack`).

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
    sweep.store.Part
        The part layout described in `sweep.store` (global attributes are
        added by the caller).
    """
    from . import analysis, locus, loop

    N, D = loop.assemble(config, variants.values, count=variants.count)
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
    coords = _coords(config, variants, gains, kept)
    variables: dict[str, store.Var] = dict(coords)
    for name, dims in analysis.VARIABLE_DIMS.items():
        if name in res:
            variables[name] = store.Var(tuple(dims), np.asarray(res[name]), dict(analysis.VARIABLE_ATTRS[name]))
    variables.update(_locus_vars(traced))
    return store.Part(variables, tuple(coords), {})


# the module's own chunk computation, for the layout parts must have (tests may replace `compute_chunk`)
_own_compute_chunk = compute_chunk


def _locus_vars(traced) -> dict[str, store.Var]:
    """Kept loci (float32) and the chunk's envelope arrays, from a `sweep.locus.ChunkLocus`."""
    dims = ("locus_variant", "gain", "branch")
    k = traced.kept_roots
    out: dict[str, store.Var] = {
        "locus_real": store.Var(dims, k.real.astype(np.float32),
                                {"long_name": "real part of closed-loop root", "units": "1/s"}),
        "locus_imag": store.Var(dims, k.imag.astype(np.float32),
                                {"long_name": "imaginary part of closed-loop root", "units": "rad/s"}),
    }
    for name, arr in traced.envelope.to_arrays().items():
        out[name] = store.Var(("gain",), arr,
                              {"long_name": f"chunk {name.split('_')[1]} of spectral abscissa", "units": "1/s"})
    return out


# ---------------------------------------------------------------- chunk tasks


def _compute_and_write(fn: Callable, config: Config, i: int, variants: Variants, gains: np.ndarray,
                       kept: np.ndarray, path: Path, attrs: dict, owner: int | None = None
                       ) -> tuple[int, store.Part, float, float]:
    """Compute chunk ``i`` and write its part; returns ``(i, part, compute s, write s)``.

    Runs in this process or in a local worker. ``owner`` is the pid of the
    run that sent the task to a worker: a worker whose run has died (SIGKILL)
    does not start the chunks still queued for it.
    """
    if owner is not None and os.getppid() != owner:
        raise SweepError("the run that asked for this chunk has stopped")
    t0 = time.perf_counter()
    part = fn(config, variants, gains, kept)
    t1 = time.perf_counter()
    part.attrs.update(attrs)
    part.attrs["code_sha256"] = CODE_SHA256  # of the process that computed it
    part.attrs["compute_seconds"] = t1 - t0  # for the run's log when a worker computed it
    store.write_part(part, path)
    return i, part, t1 - t0, time.perf_counter() - t1


class _Claims:
    """Which process computes which chunk of a run: the first to create the chunk's claim file.

    Files in the parts folder, named after the run: ``.run-ID`` exists while
    the run accepts work (the run removes it when it stops, and its workers
    then stop taking chunks), ``.claim-ID-00005`` is created exclusively
    (``O_EXCL``) by the one process that computes chunk 5. Leftovers of a
    killed run are removed by the next run (`_remove_leftovers`).
    """

    def __init__(self, parts: Path, run: str):
        self.parts, self.run = parts, run
        self.marker = parts / f".run-{run}"

    def open(self) -> None:
        self.marker.touch()

    def close(self) -> None:
        try:
            self.marker.unlink()
        except FileNotFoundError:
            pass

    def active(self) -> bool:
        return self.marker.exists()

    def take(self, i: int) -> bool:
        try:
            os.close(os.open(self.parts / f".claim-{self.run}-{i:05d}", os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))
        except FileExistsError:
            return False
        return True


# A worker's copy of the variants of the run it works for (by config sha256), made by its warm-up.
_VARIANTS: dict[str, Variants] = {}


def _variants_of(config: Config) -> Variants:
    """The run's variants in a worker, generated again (deterministic from the config)."""
    variants = _VARIANTS.get(config.sha256)
    if variants is None:
        _VARIANTS.clear()
        variants = _VARIANTS[config.sha256] = designs.generate(config)
    return variants


def _worker_loop(fn: Callable, config: Config, gains: np.ndarray, mask: np.ndarray,
                 ranges: list[tuple[int, int]], todo: list[int], parts: Path, run: str, owner: int) -> int:
    """A local worker's whole share of a run: claim the next free chunk, compute it, write it; repeat.

    The workers and the run's own process take chunks from the same list in
    the same order, so none waits for another to hand out work and the
    last chunks are shared out one at a time. The worker generates the
    variants again (deterministic from the config; the run checks every
    part's parameter values against its own). Returns the number of chunks
    done.
    """
    claims = _Claims(parts, run)
    variants = None
    done = 0
    for i in todo:
        if os.getppid() != owner or not claims.active():
            break  # the run has stopped (finished, failed or killed)
        if not claims.take(i):
            continue
        if variants is None:
            variants = _variants_of(config)
        a, b = ranges[i]
        attrs = {"config_sha256": config.sha256, "variant_start": a, "variant_stop": b, "chunk": i,
                 "computed_by": os.getpid()}
        _compute_and_write(fn, config, i, variants.slice(a, b), gains, mask[a:b], _part_path(parts, i), attrs)
        done += 1
    return done


def _compute(fn: Callable, config: Config, i: int, variants: Variants, gains: np.ndarray,
             kept: np.ndarray) -> tuple[int, store.Part, float]:
    """Compute chunk ``i`` on a Dask worker; the run's own process writes the part."""
    t0 = time.perf_counter()
    part = fn(config, variants, gains, kept)
    part.attrs["code_sha256"] = CODE_SHA256  # of the worker: checked by the run
    return i, part, time.perf_counter() - t0


def _warm_up(config: Config) -> None:
    """A worker's first task: the nominal through the whole chunk computation.

    It loads the compiled kernels (and anything else a chunk needs the first
    time) while the run is still setting up, so the worker's first real chunk
    runs at full speed. Any failure is left for the real chunks to report.
    """
    try:
        nominal = Variants(values=config.nominal_values(), design=np.array(["nominal"]))
        compute_chunk(config, nominal, nominal_gains(config), np.ones(1, dtype=bool))
        _variants_of(config)
    except Exception:
        pass


def _worker_init() -> None:
    """Start-up of a local worker.

    Leaves Ctrl-C to the run (which stops the workers itself), follows the
    run if it dies (a SIGKILL of the run must not leave workers computing
    for nobody) and imports what chunks need while the run sets up.
    """
    import signal
    import threading

    parent = os.getppid()

    def follow_parent() -> None:
        while True:
            time.sleep(0.5)
            if os.getppid() != parent:
                os._exit(1)  # a part being written is left as a temporary file, removed by the next run

    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        threading.Thread(target=follow_parent, name="sweep-follow-run", daemon=True).start()
        from . import analysis, locus, loop  # noqa: F401  (import now, while the run sets up)
    except BaseException:  # never break the pool here: a real failure shows in the first chunk
        pass


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
            if man.get("code_sha256", CODE_SHA256) != CODE_SHA256:
                # mixing the numbers of two versions would not equal either run: keep the parts, refuse
                raise InputError(
                    f"{parts} was computed by another version of sweep ({man.get('sweep_version')}, code"
                    f" {str(man.get('code_sha256'))[:12]}...); finish it with that version, or remove that"
                    " folder (or choose another -o) to start again with this one",
                    file=config.source,
                )
            log(f"resuming from {parts.name}")
            return man
        # the parts stay: each is checked against the new manifest (hash, range, grid, kept loci)
        log(f"{MANIFEST} unreadable; writing it again")
    parts.mkdir(parents=True, exist_ok=True)
    gains = nominal_gains(config)
    mask = kept_mask(config, variants)
    man = {
        "config_sha256": config.sha256,
        "variants": variants.count,
        "chunk_size": int(config.sweep.chunk_size),
        "chunks": math.ceil(variants.count / config.sweep.chunk_size),
        "sweep_version": __version__,
        "code_sha256": CODE_SHA256,
        "gains": [float(g) for g in gains],  # json writes repr(float): exact round trip
        "kept": [int(i) for i in np.flatnonzero(mask)],
    }
    _write_json(path, man)
    return man


def _check_part(part: store.Part, name: str, gains: np.ndarray, kept: np.ndarray) -> None:
    """A part on disk must have been computed on the run's gain grid and keep the run's loci."""
    if not np.array_equal(part["gain"], gains):
        raise store.PartError(f"{name}: computed on another gain grid")
    lv = part["locus_variant"] if "locus_variant" in part else np.zeros(0, np.int64)
    if not np.array_equal(lv, kept):
        raise store.PartError(f"{name}: keeps the loci of other variants")


def _remove_leftovers(out: Path, parts: Path, log: _Log) -> None:
    """Delete temporary files of killed runs (we hold the lock, so none is being written)."""
    found = list(out.parent.glob(f".{out.name}.tmp-*")) + list(out.parent.glob(f".{out.name}.lock.tmp-*"))
    if parts.exists():
        found += list(parts.glob(".*.tmp-*")) + list(parts.glob(".claim-*")) + list(parts.glob(".run-*"))
    for f in found:
        try:
            f.unlink()
            log(f"removed leftover {f.name}")
        except OSError:
            pass


def _part_path(parts: Path, i: int) -> Path:
    return parts / f"chunk-{i:05d}.nc"


def _resume_command(config: Config, out: Path, jobs: int | None = None, scheduler: str | None = None) -> str:
    """The command line that continues the run (with its ``-j`` or ``--scheduler`` when they were given)."""
    import shlex

    how = f" --scheduler {shlex.quote(scheduler)}" if scheduler else f" -j {jobs}" if jobs is not None else ""
    return f"sweep run {shlex.quote(str(config.source))} -o {shlex.quote(str(out))}{how} --resume"


# ---------------------------------------------------------------- execution


def _cpu_count() -> int:
    try:
        return len(os.sched_getaffinity(0))  # the cores this process may use
    except (AttributeError, OSError):
        return os.cpu_count() or 1


# How local workers start: None picks "fork" where that is safe (see `_start_method`), else
# "loky" (a fresh interpreter per worker). Tests set it to exercise both.
_START_METHOD: str | None = None


def _start_method() -> str:
    """``"fork"`` on Linux when this process runs no other thread, else ``"loky"``.

    A forked worker inherits what this process has imported (and, in a
    process that has run a sweep before, the compiled kernels), so it skips
    the start of an interpreter, numpy and joblib: on a short run that
    start-up is a good part of what separates ``-j 2`` from twice the speed
    of ``-j 1``. Forking is safe only without other threads (a lock held by
    one would stay locked in the child) and with no file open for writing;
    the run forks its workers first thing, before it opens any file, and
    only when no other thread runs. A process that already runs threads (a
    notebook, a Dask client, a pool still closing) starts fresh
    interpreters instead.
    """
    import threading

    if _START_METHOD is not None:
        return _START_METHOD
    if sys.platform.startswith("linux") and threading.active_count() == 1:
        return "fork"
    return "loky"


class _Pool:
    """Local worker processes (joblib's loky process executor).

    Started before the run's set-up: each worker's first task (`_warm_up`)
    imports and loads the kernels and makes the variants while this process
    does the same and works out the gain grid, so the workers are ready
    when the chunks are handed out.
    """

    def __init__(self, workers: int, jobs: int, config: Config, method: str):
        from joblib.externals.loky.process_executor import ProcessPoolExecutor

        self.workers, self.method = workers, method
        # The run's own executor, closed at its end (no state carried from one run to the next),
        # with no idle timeout: a worker is never started again in the middle of the run
        # (for "fork": never forked while threads run and the result file is open).
        if method == "fork":
            import multiprocessing

            self.executor = ProcessPoolExecutor(max_workers=workers, context=multiprocessing.get_context("fork"),
                                                initializer=_worker_init)
        else:
            from joblib.externals.loky.backend.context import get_context

            threads = str(max(1, _cpu_count() // jobs))  # no oversubscription by BLAS threads
            env = {k: threads for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
            self.executor = ProcessPoolExecutor(max_workers=workers, context=get_context("loky"), env=env,
                                                initializer=_worker_init)
        for _ in range(workers):  # load the kernels and make the variants while the run sets up
            self.executor.submit(_warm_up, config)

    def start(self, *args) -> list:
        """One `_worker_loop` per worker; returns their futures."""
        return [self.executor.submit(_worker_loop, *args) for _ in range(self.workers)]

    def kill(self) -> None:
        self.executor.shutdown(wait=False, kill_workers=True)

    def close(self) -> None:
        """End of the run: the workers leave once done with what they hold (nothing to claim any more)."""
        self.executor.shutdown(wait=False)


def _run_local(todo: deque, make: Callable, pool: _Pool | None, done: Callable, *, worker_args: tuple = (),
               parts: Path | None = None, check: Callable | None = None) -> None:
    """Compute the chunks in ``todo``; ``done(i, part, compute_s, write_s)`` after each one.

    Without a pool, one after the other in this process. With one, this
    process and every worker run the same loop over the same list (see
    `_worker_loop`): claim the next free chunk, compute it, write its part.
    Between its own chunks this process reads the parts the workers have
    finished (``check`` validates them) and passes them to ``done``.
    """
    if pool is None:
        while todo:
            done(*_compute_and_write(*make(todo.popleft())))
        return
    from concurrent.futures import FIRST_COMPLETED, wait

    order = list(todo)
    todo.clear()
    run = f"{os.getpid()}-{time.time_ns()}"
    claims = _Claims(parts, run)
    claims.open()
    futures = pool.start(*worker_args, order, parts, run, os.getpid())
    others: list[int] = []  # chunks claimed by a worker, not yet read back

    def collect() -> None:
        for i in list(others):
            path = _part_path(parts, i)
            if path.exists():  # renamed into place: complete
                t0 = time.perf_counter()
                part = check(i, path)
                others.remove(i)
                done(i, part, float(part.attrs.get("compute_seconds", float("nan"))), None, time.perf_counter() - t0)
        for fut in futures:
            if fut.done():
                fut.result()  # a worker's failure is re-raised here, with its own type

    try:
        for i in order:
            collect()
            if claims.take(i):
                done(*_compute_and_write(*make(i)))
            else:
                others.append(i)
        while others:
            running = [f for f in futures if not f.done()]
            if running:
                wait(running, timeout=0.02, return_when=FIRST_COMPLETED)
            collect()
            if others and all(f.done() for f in futures):
                collect()  # a part renamed just before its worker returned
                if others:
                    raise SweepError(f"chunk {others[0]} was taken by a worker that ended without writing it")
    except KeyboardInterrupt:
        claims.close()
        pool.kill()  # stop at once; a part cut short is only a temporary file, removed next time
        raise
    except BaseException:
        claims.close()  # the workers take no new chunk; let the ones running finish (their parts are kept)
        wait(futures)
        raise
    finally:
        claims.close()


def _run_dask(tasks: deque, make: Callable, scheduler: str, write: Callable, done: Callable) -> None:
    """Compute the chunks on a Dask cluster; this process writes each part as it arrives."""
    from distributed import Client, as_completed

    client = Client(scheduler)  # as_completed finds its client as the default one
    futures = []
    try:
        if not client.scheduler_info().get("workers"):
            # the chunks would wait silently for a worker that may never come
            print(f"sweep: no Dask worker has joined {scheduler} yet; the chunks wait for one "
                  f"(start workers with 'dask worker {scheduler}', or stop with Ctrl-C)", file=sys.stderr)
        futures = [client.submit(_compute, *make(i)[:6], pure=False) for i in tasks]
        tasks.clear()
        for fut in as_completed(futures):
            if fut.status == "error":
                fut.result()  # re-raises the worker's own exception
            i, part, seconds = fut.result()
            if part.attrs.get("code_sha256") != CODE_SHA256:
                raise SweepError(f"the Dask workers run another version of sweep than this process (chunk {i});"
                                 " install the same version on every worker and run again")
            fut.release()
            t0 = time.perf_counter()
            write(i, part)
            done(i, part, seconds, time.perf_counter() - t0)
    finally:
        for f in futures:
            f.cancel()
        client.close()


def _remove_tree(folder: Path, log: _Log) -> None:
    """Remove the parts folder; a file appearing meanwhile (a worker of a killed run) is retried."""
    for _ in range(5):
        try:
            shutil.rmtree(folder)
            return
        except FileNotFoundError:
            return
        except OSError as err:
            last = err
            time.sleep(0.2)
    log(f"could not remove {folder.name} ({last}); it is not needed any more")


def _output_path(config: Config, out: str | os.PathLike | None) -> Path:
    """The result file, its folder made; an unusable one is bad input, refused before any work.

    The checks that would otherwise fail only at the very end (a folder
    given as the output, a folder that cannot be made or written) are done
    here, so a night's computation is never lost to a typo in ``-o``.
    """
    path = Path(out) if out is not None else Path("results") / f"{config.stem}.nc"
    shown = str(out) if out is not None else str(path)
    if path.name in ("", ".", ".."):
        raise InputError(f"the output needs a file name, e.g. {path / (config.stem + '.nc')}", field="-o")
    if path.is_dir():
        raise InputError(f"{shown} is a folder; give a file name in it, e.g. {path / (config.stem + '.nc')}",
                         field="-o")
    if path.exists() and not store.is_result(path):
        raise InputError(f"{shown} exists and is not a result of sweep; choose another -o (or remove that file)",
                         field="-o")
    for folder in (path.parent, *path.parent.parents):
        if folder.exists() and not folder.is_dir():
            raise InputError(f"{folder} is a file, not a folder; choose another -o", field="-o")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"cannot make the folder {path.parent} ({err.strerror or err}); choose another -o",
                         field="-o") from None
    if not os.access(path.parent, os.W_OK | os.X_OK):
        raise InputError(f"cannot write in the folder {path.parent}; choose another -o", field="-o")
    return path


def _check_scheduler(address: str) -> None:
    """A Dask scheduler address must read ``tcp://HOST:PORT`` (or ``tls://``), checked before any work."""
    import re

    m = re.fullmatch(r"(tcp|tls)://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})", address.strip())
    if m is None or not 0 < int(m.group(3)) < 65536:
        raise InputError(f"cannot read the scheduler address {address!r}; give tcp://HOST:PORT,"
                         " e.g. tcp://10.0.0.5:8786", field="--scheduler")


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
        Processes computing chunks: this one plus ``jobs - 1`` local workers
        (joblib); ``None``: all cores, ``1``: in this process only.
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
        The parts folder belongs to another config, a parameter name clashes, the
        output cannot be written (a folder, no write access) or the scheduler
        address cannot be read.
    LockError
        Another live run writes the same output.
    Interrupted
        Ctrl-C; finished parts are kept and the message holds the resume command.
    """
    t_start = time.perf_counter()
    check_names(config)
    count = designs.total_count(config)  # refuses oversized designs before anything is written
    if scheduler is not None:
        _check_scheduler(scheduler)
    out = _output_path(config, out)
    size = int(config.sweep.chunk_size)
    again = _resume_command(config, out, None if jobs is None else max(1, int(jobs)), scheduler)
    jobs = _cpu_count() if jobs is None else max(1, int(jobs))
    parts = out.with_name(out.name + ".parts")
    log = _Log(out.with_name(out.name + ".log"))

    with _Lock(out.with_name(out.name + ".lock"), log):
        log(f"start {config.source} sha256={config.sha256} variants={count} "
            f"chunk_size={size} jobs={jobs if scheduler is None else 'dask'} "
            f"resume={bool(resume)} sweep={__version__}")
        if out.exists() and store.result_is_complete(out, config_sha256=config.sha256, sweep_version=__version__):
            if parts.exists():  # a run stopped after its merge, before removing its parts
                _remove_tree(parts, log)
            log("output already complete for this config; nothing to do")
            return out
        try:
            return _run_locked(config, out, parts, log, count, size, jobs, scheduler, quiet, t_start)
        except KeyboardInterrupt:
            kept = _parts_kept(parts)
            log(f"interrupted; {kept} chunks kept")
            raise Interrupted(f"interrupted; {kept} chunks kept", again) from None
        except BrokenProcessPool as err:
            # a worker killed from outside (out of memory, kill -9) has no error of its own to show
            kept = _parts_kept(parts)
            log(f"failed: a worker process died ({type(err).__name__}); {kept} chunks kept")
            raise SweepError(f"a worker process died without an error of its own (killed from outside, e.g. when"
                             f" memory ran out); {kept} chunks kept; resume with: {again}"
                             ) from None
        except BaseException as err:
            log(f"failed: {type(err).__name__}: {' '.join(str(err).split())}; {_parts_kept(parts)} chunks kept")
            if type(err).__name__ == "KilledWorker" and type(err).__module__.startswith("distributed"):
                # Dask gave up on a chunk whose workers all died (no error of their own to show)
                raise SweepError(f"Dask workers died while computing a chunk ({' '.join(str(err).split()[:12])}"
                                 f" ...); {_parts_kept(parts)} chunks kept; resume with: {again}"
                                 ) from None
            raise


def _parts_kept(parts: Path) -> int:
    return len(list(parts.glob("chunk-*.nc"))) if parts.exists() else 0


def _run_locked(config: Config, out: Path, parts: Path, log: _Log, count: int, size: int, jobs: int,
                scheduler: str | None, quiet: bool, t_start: float) -> Path:
    """The body of `run`, once the lock is held and the output is known to be incomplete."""
    n_chunks = math.ceil(count / size) if count else 0
    workers = 0 if scheduler else min(jobs, n_chunks) - 1
    # the workers start first thing: their start-up runs beside this process's set-up
    pool = _Pool(workers, jobs, config, _start_method()) if workers > 0 else None
    try:
        if pool is not None:
            log(f"{workers} local worker(s) started ({pool.method})")
        _remove_leftovers(out, parts, log)
        variants = designs.generate(config)
        man = _manifest(config, out, parts, variants, log)
        t_merge = _compute_and_merge(config, out, parts, log, variants, man, pool, scheduler, quiet, t_start)
    finally:
        if pool is not None:
            pool.close()
    _pause_hook("cleanup", log)(0)
    _remove_tree(parts, log)  # only after the merged file is in place
    log(f"end {out.name}: {variants.count} variants in {man['chunks']} chunks; "
        f"final merge step {t_merge:.3f} s, total {time.perf_counter() - t_start:.3f} s")
    return out


def _compute_and_merge(config: Config, out: Path, parts: Path, log: _Log, variants: Variants, man: dict,
                       pool: _Pool | None, scheduler: str | None, quiet: bool, t_start: float) -> float:
    """Check the parts on disk, compute the others, build the result; returns the final merge step's time."""
    gains = np.asarray(man["gains"], dtype=float)
    kept = np.asarray(man["kept"], dtype=np.int64)
    mask = np.zeros(variants.count, dtype=bool)
    mask[kept] = True
    size = int(man["chunk_size"])
    n_chunks = int(man["chunks"])
    ranges = [(i * size, min((i + 1) * size, variants.count)) for i in range(n_chunks)]
    # the result is built while the chunks are computed; only its last step waits for the end
    writer = store.ResultWriter(out, total=variants.count, kept=np.sort(kept))
    merge_pause = _pause_hook("merge", log) if os.environ.get("SWEEP_TEST_PAUSE", "").startswith("merge:") else None

    def merge(part: store.Part, name: str) -> None:
        writer.add(part, name)
        if merge_pause is not None:
            writer.sync()
            merge_pause(writer.added)

    layout: list[store.Part] = []  # one variant's part, made when first needed: what every part must hold

    def check(i: int, path: Path) -> store.Part:
        """A part on disk, read and checked against this run (`store.PartError` if it does not belong)."""
        a, b = ranges[i]
        part = store.read_part(path, config_sha256=config.sha256, start=a, stop=b)
        if part.attrs.get("code_sha256") != CODE_SHA256:
            raise store.PartError(f"{path.name}: computed by another version of sweep")
        if not layout:  # a part laid out otherwise (another version of sweep) is computed again
            layout.append(_own_compute_chunk(config, variants.slice(0, 1), gains, mask[:1]))
        store.check_layout(layout[0], part, path.name)
        _check_part(part, path.name, gains, kept[(kept >= a) & (kept < b)])
        for name, values in variants.values.items():
            if name not in part or not np.array_equal(part[name], values[a:b]):
                raise store.PartError(f"{path.name}: parameter {name} differs from this run's variants")
        return part

    try:
        todo, done_variants = deque(), 0
        for i, (a, b) in enumerate(ranges):
            p = _part_path(parts, i)
            if p.exists():
                try:
                    part = check(i, p)
                except store.PartError as err:
                    log(f"chunk {i}: {err}; computing it again")
                    p.unlink()
                else:
                    merge(part, p.name)
                    done_variants += b - a
                    continue
            todo.append(i)
        log(f"chunks: {n_chunks} total, {n_chunks - len(todo)} valid on disk, {len(todo)} to compute")
        _compute_all(config, parts, log, variants, gains, mask, ranges, todo,
                     pool if len(todo) > 1 else None, scheduler, quiet, done_variants, merge, check, t_start)
        t0 = time.perf_counter()
        writer.finish(store.result_attrs(config, created=_now(), sweep_version=__version__))
        return time.perf_counter() - t0
    finally:
        writer.abort()  # no-op once the result is published


def _compute_all(config: Config, parts: Path, log: _Log, variants: Variants, gains: np.ndarray,
                 mask: np.ndarray, ranges: list[tuple[int, int]], todo: deque, pool: _Pool | None,
                 scheduler: str | None, quiet: bool, done_variants: int, merge: Callable,
                 check: Callable, t_start: float) -> None:
    """Compute, write and merge the chunks in ``todo``, with progress bar and log."""
    from tqdm import tqdm

    n_chunks = len(ranges)
    fn = compute_chunk  # looked up now, so a replaced module attribute is used

    def attrs(i: int) -> dict:
        a, b = ranges[i]
        return {"config_sha256": config.sha256, "variant_start": a, "variant_stop": b, "chunk": i}

    def make(i: int) -> tuple:
        a, b = ranges[i]  # chunk arguments are cut when sent, so only the chunks in flight are copied
        return (fn, config, i, variants.slice(a, b), gains, mask[a:b], _part_path(parts, i), attrs(i))

    pause = _pause_hook("chunks", log)
    pause(0)
    log(f"set-up {time.perf_counter() - t_start:.3f} s")
    bar = tqdm(total=variants.count, initial=done_variants, unit="variant",
               disable=quiet, file=sys.stderr, desc="sweep", dynamic_ncols=True)
    n_todo, written = len(todo), 0

    def done(i: int, part: store.Part | None, compute_s: float, write_s: float | None, read_s: float = 0.0) -> None:
        """Log a finished chunk and merge it. ``write_s`` None: a worker wrote it, read back in ``read_s``."""
        nonlocal written
        a, b = ranges[i]
        written += 1
        t0 = time.perf_counter()
        if part is not None:
            merge(part, _part_path(parts, i).name)
        how = (f"written in {write_s:.3f} s" if write_s is not None
               else f"by worker {part.attrs.get('computed_by', '?')}, read back in {read_s:.3f} s")
        log(f"chunk {i} variants {a}..{b - 1} computed in {compute_s:.3f} s, {how}, "
            f"merged in {time.perf_counter() - t0:.3f} s")
        bar.update(b - a)
        bar.set_postfix_str(f"chunk {n_chunks - n_todo + written}/{n_chunks}", refresh=False)
        pause(written)

    def write(i: int, part: store.Part) -> None:
        part.attrs.update(attrs(i))
        store.write_part(part, _part_path(parts, i))

    t0 = time.perf_counter()
    try:
        if scheduler:
            _run_dask(todo, make, scheduler, write, done)
        else:
            _run_local(todo, make, pool, done, worker_args=(fn, config, gains, mask, ranges), parts=parts,
                       check=check)
    finally:
        bar.close()
    log(f"chunks done: {n_todo} in {time.perf_counter() - t0:.3f} s")
