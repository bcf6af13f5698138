"""Acceptance checks of the runner and the store on inputs the other tests do not list:
unusable outputs and scheduler addresses, locks left in odd states, a worker killed from
outside, Ctrl-C at every step of a run, and results that do not depend on the chunking."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import xarray as xr

from sweep import cli, designs, runner, store
from sweep.config import load_config
from sweep.errors import InputError, SweepError

from test_runner import CONFIG, load, write_config


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted in-process run of the kiln loop of `test_runner`."""
    folder = tmp_path_factory.mktemp("ref")
    return load(runner.run(load_config(write_config(folder)), out=folder / "ref.nc", jobs=1, quiet=True))


def files(folder) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


# ------------------------------------------------------------------ bad outputs, bad addresses


@pytest.mark.parametrize("how", ["a folder", "inside a file", "no file name", "not a result", "the config"])
def test_unusable_output_refused_before_any_work(tmp_path, capsys, how):
    """A typo in -o is found before the run starts, not when the finished result is renamed."""
    cfg = write_config(tmp_path)
    (tmp_path / "folder").mkdir()
    (tmp_path / "notes.txt").write_text("my notes")
    out = {"a folder": "folder", "inside a file": "notes.txt/r.nc", "no file name": "",
           "not a result": "notes.txt", "the config": "kiln.toml"}[how]
    out = str(tmp_path / out) if out else out
    before = files(tmp_path)
    assert cli.main(["run", str(cfg), "-o", out, "-j", "1", "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("sweep run: -o: ") and "\n" not in err, err
    assert files(tmp_path) == before and files(tmp_path / "folder") == []
    assert (tmp_path / "notes.txt").read_text() == "my notes" and cfg.read_text() == CONFIG


def test_result_of_another_config_is_replaced(tmp_path):
    """A result written by sweep (of any config) is the one kind of file a run replaces."""
    out = tmp_path / "r.nc"
    runner.run(load_config(write_config(tmp_path, CONFIG.replace("seed = 5", "seed = 6"))), out=out, jobs=1, quiet=True)
    runner.run(load_config(write_config(tmp_path)), out=out, jobs=1, quiet=True)
    with xr.open_dataset(out) as ds:
        assert ds.attrs["seed"] == 5


@pytest.mark.parametrize("address", ["garbage", "127.0.0.1:8786", "tcp://host", "tcp://host:0", "tcp://h:99999",
                                     "http://host:8786"])
def test_scheduler_address_refused_before_any_work(tmp_path, capsys, address):
    cfg = write_config(tmp_path)
    assert cli.main(["run", str(cfg), "-o", str(tmp_path / "r.nc"), "--scheduler", address, "--quiet"]) == 2
    assert "--scheduler: cannot read the scheduler address" in capsys.readouterr().err
    assert files(tmp_path) == ["kiln.toml"]


def test_scheduler_address_forms_accepted():
    for address in ("tcp://10.0.0.5:8786", "tcp://node-3.cluster:8786", "tls://[::1]:8786", "tcp://localhost:1"):
        runner._check_scheduler(address)


# ------------------------------------------------------------------ locks


def test_lock_damaged_or_of_a_reused_pid_is_stale(tmp_path):
    """An empty lock (the disk filled up while it was written) and a lock whose pid now belongs
    to another, later process are both stale; the lock's own temporary file is cleaned up."""
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "l.nc"
    lock = tmp_path / "l.nc.lock"
    lock.write_text("")
    (tmp_path / ".l.nc.lock.tmp-99999").write_text("{}")  # a run killed while taking the lock
    runner.run(cfg, out=out, jobs=1, quiet=True)
    log = (tmp_path / "l.nc.log").read_text()
    assert "taking over stale lock of pid -1" in log and "removed leftover .l.nc.lock.tmp-99999" in log
    out.unlink()
    # a live process that is not the run that wrote the lock: same pid, another start time
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        lock.write_text(json.dumps({"pid": sleeper.pid, "proc_start": "1", "started": "long ago"}))
        runner.run(cfg, out=out, jobs=1, quiet=True)
    finally:
        sleeper.kill()
        sleeper.wait()
    assert f"taking over stale lock of pid {sleeper.pid}" in (tmp_path / "l.nc.log").read_text()
    assert files(tmp_path) == ["kiln.toml", "l.nc", "l.nc.log"]


def test_killed_after_publishing_before_unlocking(tmp_path):
    """Killed between the result's rename and the lock's removal: the rerun takes the stale lock
    over and returns the complete result untouched."""
    cfg = load_config(write_config(tmp_path))
    out = runner.run(cfg, out=tmp_path / "u.nc", jobs=1, quiet=True)
    stamp = out.stat().st_mtime_ns
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / "u.nc.lock").write_text(json.dumps({"pid": dead.pid, "proc_start": "1", "started": "then"}))
    assert runner.run(cfg, out=out, jobs=1, quiet=True) == out and out.stat().st_mtime_ns == stamp
    log = (tmp_path / "u.nc.log").read_text()
    assert f"taking over stale lock of pid {dead.pid}" in log and "already complete" in log
    assert files(tmp_path) == ["kiln.toml", "u.nc", "u.nc.log"]


def test_lock_appears_with_its_contents(tmp_path, monkeypatch):
    """A second run never sees an empty lock of a live run (which it would take for a stale one)."""
    seen = []
    real_link = os.link

    def link(src, dst):
        seen.append(json.loads(open(src).read()))  # complete before the lock's name exists
        return real_link(src, dst)

    monkeypatch.setattr(runner.os, "link", link)
    log = runner._Log(tmp_path / "x.log")
    with runner._Lock(tmp_path / "x.lock", log):
        held = json.loads((tmp_path / "x.lock").read_text())
        assert held["pid"] == os.getpid() and seen == [held]
        with pytest.raises(runner.LockError, match="another run"):
            with runner._Lock(tmp_path / "x.lock", log):
                pass
    assert files(tmp_path) == []  # no lock, no temporary name; the log was never needed


# ------------------------------------------------------------------ failures and Ctrl-C


def test_worker_killed_from_outside(tmp_path, reference, monkeypatch):
    """A worker killed by the system has no error of its own: one line, the resume command,
    the parts finished so far kept; the rerun gives the uninterrupted result exactly."""
    here, real, flag = os.getpid(), runner.compute_chunk, tmp_path / "a worker took a chunk"

    def kill_self_in_worker(config, variants, gains, kept):
        if os.getpid() != here and variants.count > 1:  # a real chunk (not the warm-up) in the worker
            flag.touch()
            os.kill(os.getpid(), signal.SIGKILL)
        t0 = time.time()  # this process waits for the worker to take a chunk
        while os.getpid() == here and not flag.exists() and time.time() - t0 < 60:
            time.sleep(0.02)
        return real(config, variants, gains, kept)

    monkeypatch.setattr(runner, "_START_METHOD", "fork")  # the worker inherits the patch
    monkeypatch.setattr(runner, "compute_chunk", kill_self_in_worker)
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "w.nc"
    with pytest.raises(SweepError, match="worker process died") as info:
        runner.run(cfg, out=out, jobs=2, quiet=True)
    message = str(info.value)
    assert "\n" not in message and runner._resume_command(cfg, out, 2) in message
    log = (tmp_path / "w.nc.log").read_text()
    assert "failed: a worker process died" in log
    assert not out.exists() and not (tmp_path / "w.nc.lock").exists()
    kept = len(list((tmp_path / "w.nc.parts").glob("chunk-*.nc")))
    assert f"{kept} chunks kept" in message
    monkeypatch.undo()
    runner.run(cfg, out=out, jobs=2, quiet=True)
    xr.testing.assert_identical(load(out), reference)


def test_dask_workers_dying_stop_the_run_with_the_resume_command(tmp_path, monkeypatch):
    """Dask gives up on a chunk whose workers all died (KilledWorker): one line, the resume command."""
    killed = type("KilledWorker", (Exception,), {"__module__": "distributed.scheduler"})

    def dying(tasks, make, scheduler, write, done):
        i = tasks.popleft()
        fn, config, _, variants, gains, kept = make(i)[:6]
        write(i, fn(config, variants, gains, kept))  # one chunk arrives, then the workers die
        raise killed("Attempted to run task '_compute-1' on 4 different workers,\nbut all those workers died")

    monkeypatch.setattr(runner, "_run_dask", dying)
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "d.nc"
    with pytest.raises(SweepError, match="Dask workers died") as info:
        runner.run(cfg, out=out, scheduler="tcp://127.0.0.1:8786", quiet=True)
    assert "\n" not in str(info.value) and str(info.value).endswith(runner._resume_command(cfg, out, None, "tcp://127.0.0.1:8786"))
    assert "1 chunks kept" in str(info.value) and "failed: KilledWorker" in (tmp_path / "d.nc.log").read_text()
    assert not (tmp_path / "d.nc.lock").exists()


def test_failure_in_the_last_step_is_logged(tmp_path, monkeypatch):
    real = store._publish

    def publish(tmp, path):  # the parts are written, the result is not
        if path.name == "f.nc":
            raise OSError(28, "No space left on device")
        real(tmp, path)

    monkeypatch.setattr(store, "_publish", publish)
    with pytest.raises(OSError, match="No space"):
        runner.run(load_config(write_config(tmp_path)), out=tmp_path / "f.nc", jobs=1, quiet=True)
    last = (tmp_path / "f.nc.log").read_text().splitlines()[-1]
    assert "failed: OSError: [Errno 28] No space left on device; 6 chunks kept" in last
    assert files(tmp_path) == ["f.nc.log", "f.nc.parts", "kiln.toml"]


def test_a_full_disk_does_not_hide_the_error_behind_the_log(tmp_path, monkeypatch):
    """With the disk full the log cannot be written either: the run's own error still shows."""
    real_open, real_publish = open, store._publish

    def no_log(path, *args, **kwargs):
        if str(path).endswith(".log"):
            raise OSError(28, "No space left on device (log)")
        return real_open(path, *args, **kwargs)

    def publish(tmp, path):
        if path.name == "f.nc":
            raise OSError(28, "No space left on device (result)")
        real_publish(tmp, path)

    monkeypatch.setattr(runner, "open", no_log, raising=False)
    monkeypatch.setattr(store, "_publish", publish)
    with pytest.raises(OSError, match=r"\(result\)"):
        runner.run(load_config(write_config(tmp_path)), out=tmp_path / "f.nc", jobs=1, quiet=True)
    assert len(list((tmp_path / "f.nc.parts").glob("chunk-*.nc"))) == 6


STEPS = [(runner, "nominal_gains", 1), (designs, "generate", 1), (runner, "_manifest", 1),
         (store, "write_part", 3), (store.ResultWriter, "add", 4), (store.ResultWriter, "finish", 1),
         (store, "_publish", 6), (runner, "_remove_tree", 1)]


@pytest.mark.parametrize("obj, name, nth", STEPS, ids=[f"{s[1]}-{s[2]}" for s in STEPS])
def test_ctrl_c_at_any_step(tmp_path, reference, monkeypatch, obj, name, nth):
    """Ctrl-C in the set-up, while a part is written, merged or published, or while the parts
    folder is removed: the resume command, no lock, and the rerun equals the uninterrupted run."""
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "c.nc"
    real, calls = getattr(obj, name), []

    def interrupted(*args, **kwargs):
        calls.append(1)
        if len(calls) == nth:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(obj, name, interrupted)
    with pytest.raises(runner.Interrupted) as info:
        runner.run(cfg, out=out, jobs=1, quiet=True)
    assert info.value.resume_command == runner._resume_command(cfg, out, 1)
    assert info.value.resume_command.endswith(f"-o {out} -j 1 --resume")
    assert "interrupted;" in (tmp_path / "c.nc.log").read_text()
    assert not (tmp_path / "c.nc.lock").exists()
    monkeypatch.undo()
    runner.run(cfg, out=out, jobs=1, quiet=True)  # a plain rerun
    xr.testing.assert_identical(load(out), reference)
    assert files(tmp_path) == ["c.nc", "c.nc.log", "kiln.toml"]


# ------------------------------------------------------------------ damaged parts


def _stopped_before_merge(config, out) -> None:
    """A run that wrote all its parts and stopped before publishing the result."""
    real = store.ResultWriter.finish

    def stop(*args, **kwargs):
        raise RuntimeError("stopped before the merge")

    store.ResultWriter.finish = stop
    try:
        with pytest.raises(RuntimeError, match="stopped"):
            runner.run(config, out=out, jobs=1, quiet=True)
    finally:
        store.ResultWriter.finish = real


def test_every_kind_of_damaged_part_is_computed_again(tmp_path, reference):
    """Empty, garbage, cut short, another config's hash, a part of another config, a part laid out
    by another version (one variable less), a manifest removed: each part is computed again."""
    import netCDF4

    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "x.nc"
    _stopped_before_merge(cfg, out)
    _stopped_before_merge(load_config(write_config(tmp_path, CONFIG.replace("seed = 5", "seed = 6"), "o.toml")),
                          tmp_path / "o.nc")
    parts = tmp_path / "x.nc.parts"
    (parts / "chunk-00000.nc").write_bytes(b"")
    (parts / "chunk-00001.nc").write_bytes(b"not a netCDF file " * 50)
    cut = parts / "chunk-00002.nc"
    cut.write_bytes(cut.read_bytes()[:-100])
    with netCDF4.Dataset(parts / "chunk-00003.nc", "a") as nc:
        nc.setncattr("config_sha256", "0" * 64)
    (parts / "chunk-00004.nc").write_bytes((tmp_path / "o.nc.parts" / "chunk-00004.nc").read_bytes())
    older = store.read_part(parts / "chunk-00005.nc")
    del older.variables["dominance_ratio"]
    store.write_part(older, parts / "chunk-00005.nc")
    (parts / "manifest.json").unlink()
    runner.run(cfg, out=out, jobs=1, quiet=True)
    log = (tmp_path / "x.nc.log").read_text()
    for i, why in enumerate(["unreadable", "unreadable", "unreadable", "written for another config",
                             "written for another config", "holds other variables"]):
        assert f"chunk {i}: chunk-0000{i}.nc: {why}" in log, why
    assert "0 valid on disk, 6 to compute" in log
    xr.testing.assert_identical(load(out), reference)


def test_parts_of_other_code_are_refused_and_kept(tmp_path, reference, monkeypatch):
    """Parts record the code that computed them: after an upgrade (or an edit of an installed copy)
    the run is refused with its parts kept, since a mix of two versions equals neither run;
    a stray part of other code (its manifest lost) is computed again."""
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "v.nc"
    monkeypatch.setattr(runner, "CODE_SHA256", "0" * 64)  # the code before the upgrade
    _stopped_before_merge(cfg, out)
    monkeypatch.undo()
    before = sorted((tmp_path / "v.nc.parts").iterdir())
    with pytest.raises(InputError, match="another version of sweep.*finish it with that version"):
        runner.run(cfg, out=out, jobs=1, quiet=True)
    assert sorted((tmp_path / "v.nc.parts").iterdir()) == before
    (tmp_path / "v.nc.parts" / "manifest.json").unlink()
    runner.run(cfg, out=out, jobs=1, quiet=True)
    log = (tmp_path / "v.nc.log").read_text()
    assert "chunk 0: chunk-00000.nc: computed by another version of sweep" in log
    assert "0 valid on disk, 6 to compute" in log
    xr.testing.assert_identical(load(out), reference)


# ------------------------------------------------------------------ chunking


MANY_DESIGNS = CONFIG.replace('designs = ["nominal", "corners", "random"]',
                              'designs = ["lhs", "grid", "nominal", "sobol", "corners", "random"]').replace(
    "samples = 21", "samples = 6\nlevels = 2").replace('keep = "corners"', 'keep = "random:100"')


def test_seed_above_64_bits_is_stored(tmp_path):
    """TOML integers may exceed what a netCDF attribute holds: the seed is kept as its digits
    (it failed only when the finished result was written)."""
    seed = 2**70 + 1
    out = runner.run(load_config(write_config(tmp_path, CONFIG.replace("seed = 5", f"seed = {seed}"))),
                     out=tmp_path / "s.nc", jobs=1, quiet=True)
    with xr.open_dataset(out) as ds:
        assert ds.attrs["seed"] == str(seed)


def test_results_do_not_depend_on_the_chunking(tmp_path):
    """One variant per chunk, a count that is not a multiple of the chunk, one chunk larger than
    the run: every variable equal bit for bit (the mean of the envelope to rounding)."""
    runs = []
    for size in (1, 4, 1000):
        text = MANY_DESIGNS.replace("chunk_size = 5", f"chunk_size = {size}")
        out = runner.run(load_config(write_config(tmp_path, text, f"c{size}.toml")), out=tmp_path / f"c{size}.nc",
                         jobs=1, quiet=True)
        runs.append(load(out))
    first = runs[0]
    # nominal first, then the designs in config order: 6 lhs, 2^3 grid, 6 sobol, 8 corners, 6 random
    counts = {"nominal": 1, "lhs": 6, "grid": 8, "sobol": 6, "corners": 8, "random": 6}
    assert list(first.design.values) == [d for d, n in counts.items() for _ in range(n)]
    assert first.sizes["locus_variant"] == 35  # random:100 of 35 variants keeps them all
    for other in runs[1:]:
        assert set(other.variables) == set(first.variables)
        for name in first.variables:
            a, b = first[name], other[name]
            assert a.dtype == b.dtype and a.dims == b.dims and a.attrs == b.attrs, name
            if name == "abscissa_mean":  # sums folded chunk by chunk
                np.testing.assert_allclose(a.values, b.values, rtol=1e-13)
            else:
                assert np.array_equal(a.values, b.values, equal_nan=a.dtype.kind == "f"), name


def test_input_error_names_its_field_for_parameter_clash(tmp_path):
    """A parameter named like a dataset variable is refused before anything is written."""
    text = CONFIG.replace("M = { nominal = 3.0", "design = { nominal = 3.0").replace("transfer = \"M /",
                                                                                  "transfer = \"design /")
    with pytest.raises(InputError, match="parameters.design"):
        runner.run(load_config(write_config(tmp_path, text)), out=tmp_path / "n.nc", jobs=1, quiet=True)
    assert files(tmp_path) == ["kiln.toml"]
