"""The run's process pool: same pixels as in this process, dying workers, interrupts, kill -9."""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.io import read_roi, write_ome_tiff
from plexwash.qc.run import latest_records, quality_table, read_ledger, run_cohort
from plexwash.qc.run import pool as pool_module
from plexwash.qc.run.plan import Job

from ._blocking_write import BLOCKING_WRITE

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork server, /proc: Linux")

CHANNELS = ["Nd143", "Nd144", "Nd145", "Nd146"]


def _cohort(folder: Path, names=("a", "b", "c", "d"), size=64) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    for name in names:
        stack = rng.poisson(2.0, (len(CHANNELS), size, size)).astype(np.float32)
        stack[:, size // 4: size // 2, size // 4: size // 2] += rng.poisson(40.0, (len(CHANNELS), size // 4, size // 4))
        write_ome_tiff(folder / f"{name}.ome.tiff", stack, CHANNELS)
    return folder


def _pixel_hashes(out: Path) -> dict[str, str]:
    # reference: hashlib.sha256 over the decoded level-0 pixels (the files carry times)
    return {p.name: hashlib.sha256(np.ascontiguousarray(read_roi(p).data).tobytes()).hexdigest()
            for p in sorted(out.glob("*.ome.tiff"))}


def test_pool_and_this_process_give_the_same_outputs(tmp_path, monkeypatch):
    cohort = _cohort(tmp_path / "cohort")
    assert pool_module.pool_size([Job("a", cohort / "a.ome.tiff", tmp_path, None, tmp_path, "")] * 4, 2) == 2
    pooled = run_cohort(cohort, tmp_path / "pool", progress=False)
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", -1)  # every ROI too big for the pool
    here = run_cohort(cohort, tmp_path / "here", progress=False)
    assert pooled.done == here.done == 4
    pids = {r["pid"] for r in read_ledger(tmp_path / "pool")}
    assert os.getpid() not in pids and len(pids) <= min(4, os.cpu_count() or 1)
    assert {r["pid"] for r in read_ledger(tmp_path / "here")} == {os.getpid()}
    assert _pixel_hashes(tmp_path / "pool") == _pixel_hashes(tmp_path / "here")
    assert quality_table(tmp_path / "pool") == quality_table(tmp_path / "here")
    assert "worker process" in (tmp_path / "pool" / "run.log").read_text()


def test_workers_option_uses_the_pool(tmp_path):
    cohort = _cohort(tmp_path / "cohort", names=("a", "b", "c"))
    summary = run_cohort(cohort, tmp_path / "run", workers=1, progress=False)
    assert summary.done == 3
    pids = {r["pid"] for r in read_ledger(tmp_path / "run")}
    assert len(pids) == 1 and os.getpid() not in pids  # one worker, reused for every ROI


def test_pool_size_decides_by_pixels_cores_and_memory(tmp_path, monkeypatch):
    cohort = _cohort(tmp_path / "cohort", names=("a", "b"), size=32)
    jobs = [Job(n, cohort / f"{n}.ome.tiff", tmp_path, None, tmp_path, "") for n in ("a", "b")]
    pixels = len(CHANNELS) * 32 * 32 * 4
    monkeypatch.setattr(pool_module, "_available_memory", lambda: 10**12)
    assert pool_module.pool_size(jobs, 8) == 2  # no more processes than ROIs
    assert pool_module.pool_size(jobs, 1) == 0  # one core: this process
    assert pool_module.pool_size(jobs[:1], 8) == 0  # one ROI: this process
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", pixels - 1)
    assert pool_module.pool_size(jobs, 8) == 0  # too big for the pool
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", pixels)
    one = pool_module.WORKER_BASE_BYTES + pool_module.WORKER_BYTES_PER_PIXEL_BYTE * pixels
    monkeypatch.setattr(pool_module, "_available_memory", lambda: 3 * one)
    assert pool_module.pool_size(jobs, 8) == 0  # two workers do not fit in half the memory
    monkeypatch.setattr(pool_module, "_available_memory", lambda: 4 * one)
    assert pool_module.pool_size(jobs, 8) == 2


def _wash_or_die(job):
    """A stand-in for wash_one, run in the workers: the ROI ``b`` ends its process."""
    if job.roi == "b":
        os._exit(7)
    return {"roi": job.roi, "status": "done", "pid": os.getpid(), "threads": job.threads}


def _failed(job, exc):
    return {"roi": job.roi, "status": "failed", "error": str(exc)}


def test_a_dying_worker_gives_a_failed_record_and_the_others_go_on(tmp_path):
    jobs = [Job(n, tmp_path / f"{n}.ome.tiff", tmp_path, None, tmp_path, "") for n in "abcde"]
    records = list(pool_module.wash_in_processes(jobs, 2, 2, _wash_or_die, _failed))
    by_roi = {r["roi"]: r for r in records}
    assert sorted(by_roi) == list("abcde") and len(records) == 5
    assert by_roi["b"]["status"] == "failed" and "exit code 7" in by_roi["b"]["error"]
    assert all(by_roi[n]["status"] == "done" and by_roi[n]["threads"] == 1 for n in "acde")
    assert len({by_roi[n]["pid"] for n in "acde"}) <= 3  # workers are reused; the dead one replaced


def test_a_script_without_a_main_guard_runs_on_the_pool(tmp_path):
    """The workers do not import the calling script again (it would run the run again)."""
    cohort = _cohort(tmp_path / "cohort", names=("a", "b", "c"), size=32)
    script = tmp_path / "script.py"
    script.write_text("import sys\nfrom plexwash.qc.run import run_cohort\n"
                      f"s = run_cohort({str(cohort)!r}, {str(tmp_path / 'run')!r}, progress=False)\n"
                      "sys.exit(s.exit_code)\n")
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    records = read_ledger(tmp_path / "run")
    assert sorted(r["roi"] for r in records) == ["a", "b", "c"] and os.getpid() not in {r["pid"] for r in records}


def _wash_then_end(job):
    """A stand-in for wash_one: after ROI ``a`` the worker ends while it is idle."""
    if job.roi == "a":
        import threading

        threading.Timer(0.1, os._exit, (3,)).start()
    return {"roi": job.roi, "status": "done", "pid": os.getpid()}


def test_a_worker_that_ended_while_idle_is_replaced(tmp_path):
    jobs = [Job(n, tmp_path / f"{n}.ome.tiff", tmp_path, None, tmp_path, "") for n in "abc"]
    records = []
    for record in pool_module.wash_in_processes(jobs, 1, 2, _wash_then_end, _failed):
        records.append(record)
        time.sleep(1.0)  # the worker has ended by the time it would get the next ROI
    assert [(r["roi"], r["status"]) for r in records] == [("a", "done"), ("b", "done"), ("c", "done")]
    assert records[0]["pid"] != records[1]["pid"] == records[2]["pid"]


def test_the_fork_server_runs_one_thread(tmp_path):
    from multiprocessing import forkserver

    pool_module._context()
    pid = forkserver._forkserver._forkserver_pid
    assert pid is not None
    # reference: proc(5), /proc/PID/task holds one entry per thread of the process
    assert len(os.listdir(f"/proc/{pid}/task")) == 1


# --------------------------------------------------------------------------- interrupts, kill -9

# Loaded by every Python process started with this folder first on PYTHONPATH (the run's
# process, the fork server and so the workers): the write of level 0 of the ROI BLOCK_ROI
# stops half way through its tiles, writes the file's path and its process id into the
# marker file, and waits until a signal ends it.
_HOOK = BLOCKING_WRITE

_DRIVER = textwrap.dedent("""
    import sys
    from plexwash.qc.run import run_cohort
    try:
        s = run_cohort(sys.argv[1], sys.argv[2], progress=False)
    except KeyboardInterrupt:
        sys.exit(130)
    sys.exit(s.exit_code)
""")


def _start(cohort: Path, out: Path, hook_dir: Path, marker: Path):
    hook_dir.mkdir(exist_ok=True)
    (hook_dir / "sitecustomize.py").write_text(_HOOK)
    env = {**os.environ, "OMP_WAIT_POLICY": "PASSIVE", "BLOCK_ROI": "c", "BLOCK_MARKER": str(marker),
           "PYTHONPATH": os.pathsep.join([str(hook_dir), *filter(None, [os.environ.get("PYTHONPATH")])])}
    return subprocess.Popen([sys.executable, "-c", _DRIVER, str(cohort), str(out)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _blocked(marker: Path, process, timeout=300) -> tuple[int, Path]:
    """(worker pid, half-written file) once the hook blocks; the timeout only bounds a broken run."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if marker.exists() and marker.read_text():
            pid, path = marker.read_text().split(" ", 1)
            return int(pid), Path(path)
        if process.poll() is not None:
            raise AssertionError(f"run ended before the blocked write: {process.communicate()}")
        time.sleep(0.02)
    process.kill()
    raise AssertionError("the run never reached the blocked write")


def _gone(pid: int, timeout=30.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        try:  # a zombie (ended, not yet reaped by its parent) counts as ended
            if Path(f"/proc/{pid}/stat").read_text().split(")")[-1].split()[0] == "Z":
                return True
        except OSError:
            return True
        time.sleep(0.05)
    return False


@pytest.mark.slow
@pytest.mark.parametrize("how", ["ctrl-c", "kill-9"])
def test_interrupt_or_kill_with_the_pool(tmp_path, how, monkeypatch):
    cohort = _cohort(tmp_path / "cohort", names=("a", "b", "c", "d", "e"))
    out = tmp_path / "run"
    marker = tmp_path / "blocked"
    process = _start(cohort, out, tmp_path / "hook", marker)
    worker, torn = _blocked(marker, process)
    assert worker != process.pid and torn.parent == out and torn.is_file()
    process.send_signal(signal.SIGINT if how == "ctrl-c" else signal.SIGKILL)
    process.wait(timeout=60)
    assert process.returncode == (130 if how == "ctrl-c" else -signal.SIGKILL)
    assert _gone(worker)  # the worker ended with the run (kill -9: through the fork server's end)
    latest = latest_records(read_ledger(out))
    assert "c" not in latest and all(r["status"] == "done" for r in latest.values())
    for record in latest.values():  # every record vouches for its output
        assert hashlib.sha256((out / record["output"]).read_bytes()).hexdigest() == record["output_sha256"]
    if how == "ctrl-c":
        assert not torn.exists() and not (out / "c.ome.tiff").exists()
        assert not [p for p in out.iterdir() if p.name.startswith(".") and "plexwash-run" not in p.name]
        assert "interrupted" in (out / "run.log").read_text()
    summary = run_cohort(cohort, out, progress=False)  # a rerun finishes what is left
    assert summary.done + summary.skipped == 5 and summary.failed == 0
    assert not torn.exists()
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", -1)  # the same cohort in this process
    run_cohort(cohort, tmp_path / "here", progress=False)
    assert _pixel_hashes(out) == _pixel_hashes(tmp_path / "here")


def _what_the_worker_inherited(job):
    """Run in a worker: what it found loaded when it started, before any ROI."""
    from plexwash.qc.run import warm

    return {"roi": job.roi, "status": "done",
            "modules": [name for name in ("dask.array", "tifffile") if name in sys.modules],
            "kernel_modules": [name for name in warm.MODULES if name.endswith("_kernels")
                               and name in sys.modules]}


def test_the_warm_fork_server_runs_one_thread_and_its_workers_inherit_the_warm_up(tmp_path):
    from multiprocessing import forkserver

    pool_module.start_server()
    pid = forkserver._forkserver._forkserver_pid
    jobs = [Job("a", tmp_path / "a.ome.tiff", tmp_path, None, tmp_path, "")]
    # the first worker is forked once the server's preload (the warm-up included) is done
    (record,) = pool_module.wash_in_processes(jobs, 1, 1, _what_the_worker_inherited, _failed)
    assert record["modules"] == ["dask.array", "tifffile"]
    from plexwash.qc.run import warm

    kernel_modules = [name for name in warm.MODULES if name.endswith("_kernels")]
    assert len(kernel_modules) >= 5 and record["kernel_modules"] == kernel_modules  # imported before the fork
    # reference: proc(5), /proc/PID/task holds one entry per thread of the process
    assert len(os.listdir(f"/proc/{pid}/task")) == 1


def test_the_warm_up_imports_the_engine_and_makes_the_tables_without_a_thread():
    program = ("import sys, threading; from plexwash.qc.run import warm; "
               "from plexwash.qc.steps import speckle_chains as sc; "
               "print(all(m in sys.modules for m in warm.MODULES if m.startswith('plexwash')), "
               "sc._chain_tables.cache_info().currsize, threading.active_count())")
    out = subprocess.run([sys.executable, "-c", program], capture_output=True, text=True, check=True)
    imported, tables, threads = out.stdout.split()
    assert imported == "True" and int(tables) >= 1 and threads == "1"  # nothing run that starts a thread


def test_the_command_line_starts_the_fork_server_early_only_for_a_cohort_bound_for_the_pool(tmp_path, monkeypatch):
    started = []
    monkeypatch.setattr(pool_module, "start_server", lambda: started.append(1))
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1})
    two = _cohort(tmp_path / "two", names=("a", "b"))
    one = _cohort(tmp_path / "one", names=("a",))
    assert pool_module.start_for_cohort(two) and len(started) == 1
    assert not pool_module.start_for_cohort(one)  # one ROI: washed in this process
    assert pool_module.start_for_cohort(one, workers=2) and len(started) == 2  # asked for
    assert not pool_module.start_for_cohort(tmp_path / "absent")  # the run reports it
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", 1000)
    assert not pool_module.start_for_cohort(two)  # large ROIs: washed in this process
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0})
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", 2**30)
    assert not pool_module.start_for_cohort(two) and len(started) == 2  # one core
