"""Dense ROIs for the speed benchmarks: every channel has signal, so the files compress poorly.

The demo generator's tissue (``example_stack/generate.py``) with a background of a few
counts per pixel in every channel: like a real acquisition of a well-stained stains, and
unlike the sparse demo ROIs (18 MB on disk for 160 MB of pixels), whose tiny I/O floor
flatters every ratio. Also a read + write floor process and the load average.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from _common import load_generator


def channel_names(n: int) -> list[str]:
    """n mass-tagged names on consecutive masses (so the spillover has neighbour pairs)."""
    elements = [("La", 139), ("Pr", 141), ("Nd", 142), ("Sm", 147), ("Eu", 151), ("Gd", 152),
                ("Tb", 159), ("Dy", 160), ("Ho", 165), ("Er", 166), ("Tm", 169), ("Yb", 171),
                ("Lu", 175), ("Hf", 176)]
    names, mass = [], 139
    while len(names) < n - 2:
        element = [e for e, m in elements if m <= mass][-1]
        names.append(f"{element}{mass}")
        mass += 1
    return names + ["Ir191", "Ir193"]


def dense_counts(channels: int, size: int, *, seed: int = 40) -> tuple[np.ndarray, list[str], np.ndarray]:
    """A (channels, size, size) float32 stack of dense counts, its names and true spillover."""
    gen = load_generator()
    names = channel_names(channels)
    rng = np.random.default_rng(seed)
    stains = gen.random_stains(names, rng, failed=names[5], dim=names[3], rare=names[7],
                             specks=names[9])
    spill = gen.build_spillover(names, np.random.default_rng(seed + 1))
    background = np.random.default_rng(seed + 2).uniform(2.0, 8.0, channels)
    counts, _ = gen.simulate_roi(np.random.default_rng(seed + 3), stains, spill, size,
                                 background_rate=background, dtype=np.float32, n_striped_rows=2)
    return np.ascontiguousarray(counts, np.float32), names, spill


def write_roi(path: Path, counts: np.ndarray, names: list[str]) -> Path:
    from plexwash.qc.io import write_ome_tiff

    path.parent.mkdir(parents=True, exist_ok=True)
    return write_ome_tiff(path, counts, names, pixel_size=(1.0, 1.0))


def write_spillover(path: Path, spill: np.ndarray, names: list[str]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    load_generator().write_spillover_csv(path, spill, names)
    return path


FLOOR_CHILD = """
import sys, tifffile, numpy as np
compression, tile_setting = (None if sys.argv[1] == "none" else sys.argv[1]), int(sys.argv[2])
for src, dst in zip(sys.argv[3::2], sys.argv[4::2]):
    data = tifffile.imread(src).astype(np.float32, copy=False)
    tile = min(tile_setting, -(-max(data.shape[1:]) // 16) * 16)
    tifffile.imwrite(dst, data, ome=True, photometric="minisblack", tile=(tile, tile),
                     compression=compression, metadata={"axes": "CYX"})
"""


def floor_seconds(pairs: list[tuple[Path, Path]]) -> float:
    """Wall time of one process that reads each ROI with tifffile and writes it back.

    Plain numpy + tifffile (no plexwash import), the recipe's compression and tile size:
    what any tool must pay to read and write these pixels, Python's start-up included, as
    for the ``plexwash`` process it is compared with.
    """
    return floor_process(pairs)[0]


def floor_process(pairs: list[tuple[Path, Path]]) -> tuple[float, float]:
    """:func:`floor_seconds` with the process's CPU time (user + system): (wall, CPU)."""
    from plexwash.qc.recipe import default_recipe

    settings = default_recipe().output
    args = [settings.compression, str(settings.tile)] + [str(p) for pair in pairs for p in pair]
    return _timed([sys.executable, "-c", FLOOR_CHILD, *args])[:2]


def _timed(command: list[str], env=None) -> tuple[float, float, int]:
    """Wall time, CPU time and peak resident bytes of one child process (``os.wait4``)."""
    return _timed_memory(command, env=env)[:3]


def _timed_memory(command: list[str], env=None) -> tuple[float, float, int, dict]:
    """:func:`_timed` and the peaks of the child's ``RssAnon`` / ``RssFile`` (bytes),
    sampled from ``/proc/<pid>/status`` every 20 ms while it runs (Linux; empty elsewhere).

    ``ru_maxrss`` is the peak of the whole resident set: anonymous memory (the process's
    own arrays, heap, stacks) plus the file-backed pages it maps (the code of Python,
    numpy, numba/LLVM and every shared library, about 100 MB here, shared with every
    other process that maps them). The anonymous peak is the memory that a wash costs.
    Sampling can miss a peak shorter than 20 ms, so it is a lower bound.
    """
    start = time.perf_counter()
    child = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                             env=dict(os.environ, OMP_WAIT_POLICY="PASSIVE", **(env or {})))
    peaks: dict[str, int] = {}
    status_file = Path(f"/proc/{child.pid}/status")
    while True:
        pid, status, usage = os.wait4(child.pid, os.WNOHANG)
        if pid:
            break
        for key, value in _proc_status(status_file).items():
            peaks[key] = max(peaks.get(key, 0), value)
        time.sleep(0.02)
    seconds = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)
    error = child.stderr.read().decode(errors="replace")
    child.stderr.close()
    if child.returncode != 0:
        raise SystemExit(f"{' '.join(command[:3])} failed ({child.returncode}):\n{error}")
    scale = 1 if sys.platform == "darwin" else 1024  # ru_maxrss: bytes on macOS, KiB on Linux
    return seconds, usage.ru_utime + usage.ru_stime, int(usage.ru_maxrss) * scale, peaks


def _proc_status(path: Path) -> dict[str, int]:
    """``RssAnon`` and ``RssFile`` of a ``/proc/<pid>/status`` file, in bytes ({} when unreadable)."""
    try:
        text = path.read_text()
    except OSError:
        return {}
    values = {}
    for line in text.splitlines():
        key, _, value = line.partition(":")
        if key in ("RssAnon", "RssFile") and value.strip():
            values[key] = int(value.split()[0]) * 1024
    return values


def plexwash_seconds(args: list[str], env=None) -> float:
    """Wall time of one ``plexwash`` process (this interpreter's entry point).

    Exit code 3 (the run finished, some ROIs failed: the ledger says which) is reported
    and timed like a success; any other failure stops the benchmark.
    """
    exe = Path(sys.executable).with_name("plexwash")
    start = time.perf_counter()
    done = subprocess.run([str(exe), *args], capture_output=True, text=True,
                          env=dict(os.environ, OMP_WAIT_POLICY="PASSIVE", **(env or {})))
    seconds = time.perf_counter() - start
    if done.returncode == 3:
        print(f"  note: some ROIs failed in this run ({done.stdout.strip().splitlines()[-3:]})")
    elif done.returncode != 0:
        raise SystemExit(f"plexwash {' '.join(args)} failed ({done.returncode}):\n{done.stderr}")
    return seconds


def plexwash_process(args: list[str], env=None) -> tuple[float, float, int]:
    """Wall time, CPU time (user + system) and peak resident bytes of one ``plexwash`` process.

    Read with ``os.wait4`` for that child alone (the CPU time includes the processes it
    started and waited for, e.g. the workers of ``--workers``; the peak is the child's own
    ``ru_maxrss``, reset by its ``exec``). Linux and macOS; the process must exit with 0.
    """
    return _timed([str(Path(sys.executable).with_name("plexwash")), *args], env=env)


def plexwash_process_memory(args: list[str], env=None) -> tuple[float, float, int, dict]:
    """:func:`plexwash_process` and the sampled peaks of ``RssAnon`` / ``RssFile`` (bytes)."""
    return _timed_memory([str(Path(sys.executable).with_name("plexwash")), *args], env=env)


def load() -> str:
    """The load average (1, 5, 15 min) and the cores, as text."""
    try:
        one, five, fifteen = os.getloadavg()
    except OSError:
        return "load average unknown"
    return f"load average {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"
