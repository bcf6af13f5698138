"""Tests of sweep.runner: chunks, resume after SIGKILL, refusal of another config,
corrupt parts, the lock, Dask, and the schema of the result file."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from sweep import runner, store
from sweep.config import load_config
from sweep.errors import InputError

HERE = Path(__file__).resolve().parent

CONFIG = """\
title = "Kiln heater temperature loop (test)"

[parameters]
R = { nominal = 2.0, tol = "10%", units = "ohm" }
C = { nominal = 0.5, low = 0.4, high = 0.9, units = "F" }
T = { nominal = 0.1, tol = "20%", dist = "normal", units = "s" }
M = { nominal = 3.0, dist = "fixed" }

[plant]
transfer = "M / ((R*C*s + 1) * (T*s + 1) * (s + 1))"

[loop]
gain_range = [0, inf]
operating_gain = 2

[sweep]
designs = ["nominal", "corners", "random"]
samples = 21
seed = 5
chunk_size = 5

[locus]
points = 12
keep = "corners"
"""


# ------------------------------------------------------------------ helpers


def write_config(folder: Path, text: str = CONFIG, name: str = "kiln.toml") -> Path:
    p = folder / name
    p.write_text(text)
    return p


def load(ds_path: Path) -> xr.Dataset:
    with xr.open_dataset(ds_path) as ds:
        ds = ds.load()
    ds.attrs.pop("created")
    return ds


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted in-process run; every other run must reproduce it exactly."""
    folder = tmp_path_factory.mktemp("ref")
    cfg = load_config(write_config(folder))
    out = runner.run(cfg, out=folder / "ref.nc", jobs=1, quiet=True)
    return load(out)


SCRIPT = textwrap.dedent(
    """
    import sys
    sys.path.insert(0, {tests!r})
    import test_runner
    from sweep import runner
    from sweep.config import load_config
    runner.run(load_config({cfg!r}), out={out!r}, jobs={jobs}, quiet=True)
    """
)


def spawn(cfg: Path, out: Path, pause: str | None, jobs: int = 1) -> subprocess.Popen:
    env = dict(os.environ)
    env.pop("SWEEP_TEST_PAUSE", None)
    if pause:
        env["SWEEP_TEST_PAUSE"] = pause
    code = SCRIPT.format(tests=str(HERE), cfg=str(cfg), out=str(out), jobs=jobs)
    return subprocess.Popen([sys.executable, "-c", code], env=env, cwd=cfg.parent)


def wait_for_log(out: Path, text: str, proc: subprocess.Popen, timeout: float = 60) -> None:
    log = out.with_name(out.name + ".log")
    t0 = time.time()
    while time.time() - t0 < timeout:
        if log.exists() and text in log.read_text():
            return
        if proc.poll() is not None:
            raise AssertionError(f"process ended ({proc.returncode}) before '{text}'")
        time.sleep(0.05)
    raise AssertionError(f"'{text}' not logged in {timeout} s")


# ------------------------------------------------------------------ tests


def test_schema(reference):
    ds = reference
    assert ds.sizes["variant"] == 1 + 8 + 21
    for dim in ("variant", "boundary", "pole", "zero", "breakaway", "gain", "branch", "locus_variant"):
        assert dim in ds.dims, dim
    for c in ("variant", "R", "C", "T", "M", "design", "gain", "locus_variant"):
        assert c in ds.coords, c
    np.testing.assert_array_equal(ds.variant, np.arange(30))
    assert ds.design.dtype.kind in "UO" and ds.design.values[0] == "nominal"
    assert np.all(ds.M == 3.0) and ds.R.values[0] == 2.0
    for v in ("critical_gain", "critical_gain_low", "crossing_frequency", "stable_at_reference", "gain_margin",
              "gain_margin_db", "min_damping", "dominance_ratio", "asymptote_centroid", "stable_at_start"):
        assert ds[v].dims == ("variant",), v
    for v in ("boundary_gain", "boundary_frequency", "stable_above"):
        assert ds[v].dims == ("variant", "boundary"), v
    for v in ("open_loop_pole_real", "open_loop_pole_imag", "departure_angle"):
        assert ds[v].dims == ("variant", "pole"), v
    for v in ("open_loop_zero_real", "open_loop_zero_imag", "arrival_angle"):
        assert ds[v].dims == ("variant", "zero"), v
    for v in ("breakaway_point", "breakaway_gain"):
        assert ds[v].dims == ("variant", "breakaway"), v
    assert ds.stable_at_reference.dtype == np.int8 and ds.stable_above.dtype == np.int8
    for v in ("locus_real", "locus_imag"):
        assert ds[v].dims == ("locus_variant", "gain", "branch") and ds[v].dtype == np.float32
        assert ds[v].encoding.get("zlib")
    # keep = "corners": the loci of the nominal and the corners (variants 0..8), in variant order
    np.testing.assert_array_equal(ds.locus_variant, np.arange(0, 9))
    assert ds.sizes["gain"] == 12 and np.all(np.diff(ds.gain) > 0)
    for v in ("abscissa_min", "abscissa_max", "abscissa_mean"):
        assert ds[v].dims == ("gain",)
    assert np.all(ds.abscissa_min <= ds.abscissa_mean) and np.all(ds.abscissa_mean <= ds.abscissa_max)
    for name in ds.variables:
        assert "long_name" in ds[name].attrs and "units" in ds[name].attrs, name
    assert not any(v in ds for v in store.ENVELOPE_VARS)
    a = ds.attrs
    for key in ("title", "config", "config_sha256", "seed", "designs", "feedback", "sweep_version",
                "numpy_version", "scipy_version", "xarray_version", "netCDF4_version"):
        assert key in a, key
    assert a["config"] == CONFIG and a["seed"] == 5 and a["feedback"] == "negative"
    import hashlib

    assert a["config_sha256"] == hashlib.sha256(CONFIG.encode()).hexdigest()
    # nothing that reveals the machine
    import getpass
    import socket

    text = json.dumps({k: str(v) for k, v in a.items()})
    assert socket.gethostname() not in text and "/tmp" not in text and getpass.getuser() not in text.replace(CONFIG, "")


def test_critical_gain_matches_routh_by_hand(reference):
    # nominal: M/((RCs+1)(Ts+1)(s+1)) = 3/((s+1)(0.1s+1)(s+1)) -> 0.1 s^3 + 1.2 s^2 + 2.1 s + 1 + 3k;
    # Routh (from memory): 1.2*2.1 > 0.1*(1 + 3k)  <=>  k < (25.2 - 1)/3
    np.testing.assert_allclose(reference.critical_gain.values[0], (25.2 - 1) / 3, rtol=1e-9)


def test_plain_open_result_and_parts_removed(tmp_path, reference):
    cfg = load_config(write_config(tmp_path))
    out = runner.run(cfg, out=tmp_path / "r.nc", jobs=1, quiet=True)
    assert not (tmp_path / "r.nc.parts").exists() and not (tmp_path / "r.nc.lock").exists()
    log = (tmp_path / "r.nc.log").read_text()
    assert "start" in log and "chunk 5 " in log and "end r.nc" in log
    with store.open_result(out) as ds:
        assert ds.sizes["variant"] == 30
    xr.testing.assert_identical(load(out), reference)


def children(pid: int) -> list[int]:
    """Processes whose parent is ``pid`` (Linux /proc)."""
    found = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                if int((d / "stat").read_text().rsplit(")", 1)[1].split()[1]) == pid:
                    found.append(int(d.name))
            except (OSError, IndexError, ValueError):
                pass
    return found


def kill_at(cfg: Path, out: Path, pause: str, jobs: int = 1) -> list[int]:
    """Run in a subprocess until it logs the pause ``pause``, then SIGKILL it; returns its children."""
    proc = spawn(cfg, out, pause, jobs)
    try:
        wait_for_log(out, f"test pause {pause}", proc)
        kids = children(proc.pid)
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
    return kids


@pytest.mark.slow
@pytest.mark.parametrize("pause", ["chunks:0", "chunks:3", "merge:2", "cleanup:0"])
def test_sigkill_then_resume_is_identical(tmp_path, reference, pause):
    cfg_path = write_config(tmp_path)
    out = tmp_path / "k.nc"
    kill_at(cfg_path, out, pause)
    parts = sorted(p.name for p in (tmp_path / "k.nc.parts").glob("chunk-*.nc"))
    # the result is merged while the chunks are computed: at merge:2 two parts exist and the
    # result is half written under its temporary name; at cleanup:0 it is complete, the parts not yet removed
    assert len(parts) == {"chunks:0": 0, "chunks:3": 3, "merge:2": 2, "cleanup:0": 6}[pause]
    assert out.exists() == (pause == "cleanup:0")
    assert (tmp_path / "k.nc.lock").exists()  # left behind by the killed run: stale
    if pause.startswith("merge"):
        assert list(tmp_path.glob(".k.nc.tmp-*"))
    runner.run(load_config(cfg_path), out=out, jobs=1, resume=True, quiet=True)
    log = (tmp_path / "k.nc.log").read_text()
    assert "taking over stale lock" in log
    if pause == "cleanup:0":
        assert "already complete" in log
    else:
        assert f"{len(parts)} valid on disk" in log
    xr.testing.assert_identical(load(out), reference)
    assert not list(tmp_path.glob(".k.nc.tmp-*")) and not (tmp_path / "k.nc.parts").exists()


@pytest.mark.slow
def test_killed_twice_then_resumed_is_identical(tmp_path, reference):
    """Killed while computing, killed again while the resumed run merges the parts on disk."""
    cfg_path = write_config(tmp_path)
    out = tmp_path / "k2.nc"
    kill_at(cfg_path, out, "chunks:4")
    kill_at(cfg_path, out, "merge:2")  # 2 of the 4 valid parts merged into the new temporary result
    assert len(list((tmp_path / "k2.nc.parts").glob("chunk-*.nc"))) == 4
    # what a kill in the middle of writing a part leaves: a temporary file, never a final name
    (tmp_path / "k2.nc.parts" / ".chunk-00004.nc.tmp-99999").write_bytes(b"half a file")
    runner.run(load_config(cfg_path), out=out, jobs=1, resume=True, quiet=True)
    log = (tmp_path / "k2.nc.log").read_text()
    assert "removed leftover .chunk-00004.nc.tmp-99999" in log and "4 valid on disk, 2 to compute" in log
    xr.testing.assert_identical(load(out), reference)


@pytest.mark.slow
def test_sigkill_parallel_run_then_resume_is_identical(tmp_path, reference):
    """A -j 2 run killed mid-way (its worker is orphaned), resumed with -j 2."""
    cfg_path = write_config(tmp_path)
    out = tmp_path / "kp.nc"
    workers = kill_at(cfg_path, out, "chunks:2", jobs=2)
    assert workers  # at least the joblib worker
    assert len(list((tmp_path / "kp.nc.parts").glob("chunk-*.nc"))) >= 2
    t0 = time.time()  # the worker follows its run
    while any(Path(f"/proc/{w}/cmdline").exists() and b"loky" in Path(f"/proc/{w}/cmdline").read_bytes()
              for w in workers) and time.time() - t0 < 20:
        time.sleep(0.1)
    assert time.time() - t0 < 20, "a worker outlived its run"
    runner.run(load_config(cfg_path), out=out, jobs=2, resume=True, quiet=True)
    xr.testing.assert_identical(load(out), reference)
    assert not (tmp_path / "kp.nc.parts").exists()


@pytest.mark.slow
def test_ctrl_c_on_a_parallel_run_prints_the_resume_command(tmp_path, reference):
    """SIGINT to the whole process group (what Ctrl-C in a terminal does) of `sweep run -j 2`."""
    cfg_path = write_config(tmp_path)
    out = tmp_path / "c.nc"
    env = dict(os.environ, SWEEP_TEST_PAUSE="chunks:2")
    proc = subprocess.Popen([sys.executable, "-m", "sweep", "run", str(cfg_path), "-o", str(out), "-j", "2",
                             "--quiet"], env=env, cwd=tmp_path, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    try:
        wait_for_log(out, "test pause chunks:2", proc)
        os.killpg(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == 130, err
    assert "--resume" in err and str(out) in err, err
    assert not (tmp_path / "c.nc.lock").exists() and not out.exists()
    assert len(list((tmp_path / "c.nc.parts").glob("chunk-*.nc"))) >= 2
    assert "interrupted;" in (tmp_path / "c.nc.log").read_text()
    runner.run(load_config(cfg_path), out=out, jobs=2, resume=True, quiet=True)
    xr.testing.assert_identical(load(out), reference)


def test_changed_config_refused(tmp_path, monkeypatch):
    cfg_path = write_config(tmp_path)
    out = tmp_path / "c.nc"
    monkeypatch.setattr(runner.store.ResultWriter, "finish", _boom)
    with pytest.raises(RuntimeError, match="stop before merge"):
        runner.run(load_config(cfg_path), out=out, jobs=1, quiet=True)
    monkeypatch.undo()
    write_config(tmp_path, CONFIG.replace("seed = 5", "seed = 6"))
    with pytest.raises(InputError, match="belongs to another config.*remove"):
        runner.run(load_config(cfg_path), out=out, jobs=1, quiet=True)
    assert len(list((tmp_path / "c.nc.parts").glob("chunk-*.nc"))) == 6  # untouched


def _boom(*a, **k):
    raise RuntimeError("stop before merge")


def test_corrupt_part_recomputed(tmp_path, reference, monkeypatch):
    cfg_path = write_config(tmp_path)
    out = tmp_path / "p.nc"
    monkeypatch.setattr(runner.store.ResultWriter, "finish", _boom)
    with pytest.raises(RuntimeError):
        runner.run(load_config(cfg_path), out=out, jobs=1, quiet=True)
    monkeypatch.undo()
    part = tmp_path / "p.nc.parts" / "chunk-00002.nc"
    with open(part, "r+b") as fh:
        fh.truncate(part.stat().st_size // 3)
    stamp = (tmp_path / "p.nc.parts" / "chunk-00001.nc").stat().st_mtime_ns
    runner.run(load_config(cfg_path), out=out, jobs=1, resume=True, quiet=True)
    log = out.with_name("p.nc.log").read_text()
    assert "chunk 2: chunk-00002.nc: unreadable" in log and "5 valid on disk, 1 to compute" in log
    xr.testing.assert_identical(load(out), reference)
    assert stamp  # chunk 1 was reused, not rewritten (its log line appears once)
    assert log.count("chunk 1 variants") == 1


def test_unreadable_manifest_and_foreign_grid(tmp_path, reference, monkeypatch):
    """A damaged manifest loses no part; a part computed on another gain grid is recomputed."""
    import netCDF4

    cfg_path = write_config(tmp_path)
    out = tmp_path / "m.nc"
    monkeypatch.setattr(runner.store.ResultWriter, "finish", _boom)
    with pytest.raises(RuntimeError):
        runner.run(load_config(cfg_path), out=out, jobs=1, quiet=True)
    monkeypatch.undo()
    (tmp_path / "m.nc.parts" / "manifest.json").write_text('{"config_sha2')
    with netCDF4.Dataset(tmp_path / "m.nc.parts" / "chunk-00003.nc", "a") as nc:
        nc["gain"][0] = nc["gain"][0] * 1.5
    runner.run(load_config(cfg_path), out=out, jobs=1, quiet=True)
    log = (tmp_path / "m.nc.log").read_text()
    assert "manifest.json unreadable; writing it again" in log
    assert "chunk 3: chunk-00003.nc: computed on another gain grid" in log and "5 valid on disk, 1 to compute" in log
    xr.testing.assert_identical(load(out), reference)


def test_lock_refused_while_alive_and_stale_taken_over(tmp_path):
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "l.nc"
    lock = tmp_path / "l.nc.lock"
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        lock.write_text(json.dumps({"pid": sleeper.pid, "proc_start": runner._proc_start(sleeper.pid), "started": "x"}))
        with pytest.raises(runner.LockError, match=f"pid {sleeper.pid}"):
            runner.run(cfg, out=out, jobs=1, quiet=True)
        assert lock.exists() and not out.exists()
    finally:
        sleeper.kill()
        sleeper.wait()
    runner.run(cfg, out=out, jobs=1, quiet=True)  # the sleeper is gone: the lock is stale
    assert out.exists() and not lock.exists()
    assert f"taking over stale lock of pid {sleeper.pid}" in (tmp_path / "l.nc.log").read_text()


def test_keyboard_interrupt_keeps_parts(tmp_path, monkeypatch):
    cfg = load_config(write_config(tmp_path))
    out = tmp_path / "i.nc"
    real = runner.compute_chunk
    calls = []

    def interrupting(config, variants, gains, kept):
        calls.append(variants.start)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(config, variants, gains, kept)

    monkeypatch.setattr(runner, "compute_chunk", interrupting)
    with pytest.raises(runner.Interrupted) as info:
        runner.run(cfg, out=out, jobs=1, quiet=True)
    assert "--resume" in info.value.resume_command and str(out) in info.value.resume_command
    assert len(list((tmp_path / "i.nc.parts").glob("chunk-*.nc"))) == 2
    assert not (tmp_path / "i.nc.lock").exists()


def test_worker_exception_reraised(tmp_path, monkeypatch):
    cfg = load_config(write_config(tmp_path))
    real = runner.compute_chunk

    def failing(config, variants, gains, kept):
        if variants.start >= 10:
            raise ZeroDivisionError("chunk failed on purpose")
        return real(config, variants, gains, kept)

    monkeypatch.setattr(runner, "compute_chunk", failing)
    with pytest.raises(ZeroDivisionError, match="on purpose"):
        runner.run(cfg, out=tmp_path / "w.nc", jobs=1, quiet=True)
    assert len(list((tmp_path / "w.nc.parts").glob("chunk-*.nc"))) == 2
    assert not (tmp_path / "w.nc.lock").exists()


def test_complete_output_returned(tmp_path):
    cfg = load_config(write_config(tmp_path))
    out = runner.run(cfg, out=tmp_path / "d.nc", jobs=1, quiet=True)
    stamp = out.stat().st_mtime_ns
    assert runner.run(cfg, out=out, jobs=1, quiet=True) == out
    assert out.stat().st_mtime_ns == stamp
    assert "already complete" in (tmp_path / "d.nc.log").read_text()


@pytest.mark.slow
@pytest.mark.parametrize("method", ["fork", "loky"])
@pytest.mark.parametrize("jobs", [2, 3])
def test_joblib_jobs_identical(tmp_path, reference, monkeypatch, method, jobs):
    """Forked workers and fresh-interpreter workers give the in-process result exactly."""
    monkeypatch.setattr(runner, "_START_METHOD", method)
    cfg = load_config(write_config(tmp_path))
    out = runner.run(cfg, out=tmp_path / "j.nc", jobs=jobs, quiet=True)
    xr.testing.assert_identical(load(out), reference)
    log = (tmp_path / "j.nc.log").read_text()
    assert f"{jobs - 1} local worker(s) started ({method})" in log


def test_start_method_rule(monkeypatch):
    import threading

    monkeypatch.setattr(runner, "_START_METHOD", None)
    monkeypatch.setattr(runner.sys, "platform", "linux")
    monkeypatch.setattr(threading, "active_count", lambda: 1)
    assert runner._start_method() == "fork"
    monkeypatch.setattr(threading, "active_count", lambda: 3)  # e.g. a Dask client in this process
    assert runner._start_method() == "loky"
    monkeypatch.setattr(threading, "active_count", lambda: 1)
    monkeypatch.setattr(runner.sys, "platform", "darwin")
    assert runner._start_method() == "loky"


@pytest.mark.slow
@pytest.mark.parametrize("method", ["fork", "loky"])
def test_joblib_worker_exception_reraised(tmp_path, monkeypatch, method):
    monkeypatch.setattr(runner, "_START_METHOD", method)
    cfg = load_config(write_config(tmp_path))
    real = runner.compute_chunk
    here = os.getpid()
    flag = tmp_path / "a worker took a chunk"

    def failing(config, variants, gains, kept):  # a closure: joblib ships it by value
        if os.getpid() != here:
            if variants.count > 1:  # a chunk in the worker
                flag.touch()
                raise ZeroDivisionError("chunk failed on purpose")
            return real(config, variants, gains, kept)  # its warm-up (a forked worker inherits this patch)
        t0 = time.time()  # wait for the worker (a fresh interpreter takes a while to start)
        while not flag.exists() and time.time() - t0 < 60:
            time.sleep(0.02)
        return real(config, variants, gains, kept)

    monkeypatch.setattr(runner, "compute_chunk", failing)
    with pytest.raises(ZeroDivisionError, match="on purpose"):
        runner.run(cfg, out=tmp_path / "jw.nc", jobs=2, quiet=True)
    assert not (tmp_path / "jw.nc.lock").exists() and not (tmp_path / "jw.nc").exists()
    log = (tmp_path / "jw.nc.log").read_text()
    assert "failed: ZeroDivisionError" in log
    # the chunks this process finished before the failure came back are kept
    kept = sorted(p.name for p in (tmp_path / "jw.nc.parts").glob("chunk-*.nc"))
    assert kept and all(f"chunk {int(n[6:11])} variants" in log for n in kept)


NO_PARAMETERS = """\
title = "Kiln heater with every value fixed (test)"

[plant]
num = ["3"]
den = ["0.1", "1.2", "2.1", "1"]

[loop]
gain_range = [0, inf]
operating_gain = 2

[sweep]
designs = ["nominal", "corners", "random"]
samples = 4
chunk_size = 2

[locus]
points = 12
keep = "all"
"""

EDGE_CONFIGS = {
    "one chunk, more jobs than chunks": CONFIG.replace("chunk_size = 5", "chunk_size = 1000"),
    "one variant per chunk, keep all": CONFIG.replace("chunk_size = 5", "chunk_size = 1").replace(
        'keep = "corners"', 'keep = "all"'),
    "no uncertain parameter": CONFIG.replace('tol = "10%", units = "ohm"', 'dist = "fixed", units = "ohm"')
    .replace('low = 0.4, high = 0.9, units = "F"', 'dist = "fixed", units = "F"')
    .replace('tol = "20%", dist = "normal", units = "s"', 'dist = "fixed", units = "s"'),
    "no parameter at all": NO_PARAMETERS,
    "no operating gain, keep none": CONFIG.replace("operating_gain = 2\n", "").replace(
        'keep = "corners"', 'keep = "none"'),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", list(EDGE_CONFIGS))
def test_edge_configs_same_result_for_any_jobs(tmp_path, name):
    """Configs the kill tests do not cover: -j 1 and -j 3 give the same file, which plain xarray opens."""
    text = EDGE_CONFIGS[name]
    cfg = load_config(write_config(tmp_path, text))
    one = load(runner.run(cfg, out=tmp_path / "one.nc", jobs=1, quiet=True))
    three = load(runner.run(cfg, out=tmp_path / "three.nc", jobs=3, quiet=True))
    xr.testing.assert_identical(one, three)
    with xr.open_dataset(tmp_path / "three.nc") as ds:  # no engine, no sweep: a plain netCDF file
        n = ds.sizes["variant"]
        assert ds.attrs["config"] == text and list(ds.variant.values) == list(range(n))
        keep = "all" if 'keep = "all"' in text else "none" if 'keep = "none"' in text else "corners"
        assert ds.sizes["locus_variant"] == {"all": n, "none": 0}.get(keep, ds.sizes["locus_variant"])
        assert np.isfinite(ds.abscissa_mean.values).all()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["kiln.toml", "one.nc", "one.nc.log", "three.nc", "three.nc.log"])


def test_parameter_name_clash_refused(tmp_path):
    import dataclasses

    cfg = load_config(write_config(tmp_path))
    bad = dataclasses.replace(cfg, parameters=cfg.parameters[:-1] + (dataclasses.replace(cfg.parameters[-1], name="gain"),))
    with pytest.raises(InputError, match="parameters.gain"):
        runner.run(bad, out=tmp_path / "n.nc", jobs=1, quiet=True)
    assert not (tmp_path / "n.nc.parts").exists()


@pytest.mark.slow
def test_dask_local_cluster_identical(tmp_path, reference, monkeypatch):
    distributed = pytest.importorskip("distributed")
    cloudpickle = pytest.importorskip("cloudpickle")
    cfg = load_config(write_config(tmp_path))
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        out = runner.run(cfg, out=tmp_path / "dask.nc", scheduler=cluster.scheduler_address, quiet=True)
        xr.testing.assert_identical(load(out), reference)
        # a failing worker: its own exception comes back, finished parts stay
        cloudpickle.register_pickle_by_value(sys.modules[__name__])
        try:
            monkeypatch.setattr(runner, "compute_chunk", _failing_chunk)
            with pytest.raises(ZeroDivisionError, match="on purpose"):
                runner.run(cfg, out=tmp_path / "bad.nc", scheduler=cluster.scheduler_address, quiet=True)
        finally:
            cloudpickle.unregister_pickle_by_value(sys.modules[__name__])
    assert not (tmp_path / "bad.nc").exists() and not (tmp_path / "bad.nc.lock").exists()
    assert (tmp_path / "bad.nc.parts" / "manifest.json").exists()


def _failing_chunk(config, variants, gains, kept):
    """Fails for the chunks from variant 10 on (module level, shipped to Dask workers by value)."""
    from sweep import runner as r

    if variants.start >= 10:
        raise ZeroDivisionError("chunk failed on purpose")
    return r.compute_chunk(config, variants, gains, kept)


@pytest.mark.slow
def test_dask_scheduler_without_workers_says_it_waits(tmp_path, monkeypatch):
    distributed = pytest.importorskip("distributed")
    import io
    import threading

    cfg = load_config(write_config(tmp_path))
    with distributed.LocalCluster(n_workers=0, processes=False, protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:

        class WorkerOnNotice(io.StringIO):
            """stderr that lets a worker join once the run has said it waits for one."""

            def write(self, text):
                if "no Dask worker has joined" in text:
                    threading.Thread(target=cluster.scale, args=(1,)).start()
                return super().write(text)

        err = WorkerOnNotice()
        monkeypatch.setattr(sys, "stderr", err)
        out = runner.run(cfg, out=tmp_path / "late.nc", scheduler=cluster.scheduler_address, quiet=True)
    assert out.exists()
    assert "start workers with 'dask worker tcp://127.0.0.1:" in err.getvalue()
