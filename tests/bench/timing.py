"""Timing and memory helpers: interleaved repeats, child processes, peak RSS."""

from __future__ import annotations

import gc
import json
import os
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


@dataclass
class Timing:
    best: float  # CPU seconds of the calling thread, least disturbed run
    median: float
    wall: float  # wall-clock seconds of the least disturbed run
    runs: int


def interleaved(fns: dict[str, Callable[[], object]], *, repeat: int) -> dict[str, Timing]:
    """Time each callable ``repeat`` times, round-robin, so that load from other jobs on
    the machine hits ours and the reference alike.

    The figure is the minimum of the calling thread's CPU time (``time.thread_time``):
    on a shared machine wall-clock time mostly measures who else is running, while
    both sides here are single-threaded and run in this thread (torch with
    ``set_num_threads(1)``, numba kernels without parallel loops). The median and the
    best wall-clock time are kept for the record.
    """
    runs: dict[str, list[tuple[float, float]]] = {k: [] for k in fns}
    for _ in range(repeat):
        for k, f in fns.items():
            gc.collect()  # the garbage one side left is not the next one's time
            c0, t0 = time.thread_time(), time.perf_counter()
            f()
            runs[k].append((time.thread_time() - c0, time.perf_counter() - t0))
    out = {}
    for k, v in runs.items():
        cpu = sorted(c for c, _ in v)
        wall = min(w for _, w in v)
        out[k] = Timing(cpu[0], cpu[len(cpu) // 2], wall, len(v))
    return out


def child_env(**extra: str) -> dict[str, str]:
    """Environment for a child process: this checkout first on the path, one thread."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    env.setdefault("NUMBA_NUM_THREADS", "1")
    env.setdefault("OMP_NUM_THREADS", "1")
    env.setdefault("MKL_NUM_THREADS", "1")
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.update(extra)
    return env


def _tree_rss(pid: int) -> int:
    """Resident bytes of ``pid`` and all its descendants (Linux /proc)."""
    total = 0
    stack = [pid]
    seen = set()
    while stack:
        p = stack.pop()
        if p in seen:
            continue
        seen.add(p)
        try:
            with open(f"/proc/{p}/statm") as f:
                total += int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as f:
                    stack.extend(int(c) for c in f.read().split())
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            continue
    return total


@dataclass
class ChildResult:
    seconds: float
    peak_tree_bytes: int
    stdout: str
    stderr: str
    returncode: int

    def json(self) -> dict:
        """The last line of stdout that parses as a JSON object."""
        for line in reversed(self.stdout.strip().splitlines()):
            line = line.strip()
            if line.startswith("{"):
                return json.loads(line)
        raise RuntimeError(
            f"child printed no JSON (exit {self.returncode}):\n{self.stdout[-2000:]}\n"
            f"{self.stderr[-4000:]}"
        )


def run_child(
    args: list[str], *, env: dict[str, str] | None = None, timeout: float = 1800
) -> ChildResult:
    """Run a command, sampling the summed RSS of its process tree every 20 ms."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        args,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env or child_env(),
        cwd=str(REPO),
    )
    peak = 0
    stop = threading.Event()

    def sample() -> None:
        nonlocal peak
        while not stop.is_set():
            peak = max(peak, _tree_rss(proc.pid))
            stop.wait(0.02)

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
    stop.set()
    th.join()
    return ChildResult(time.perf_counter() - t0, peak, out, err, proc.returncode)


def python_child(code: str, **kw) -> ChildResult:
    return run_child([sys.executable, "-c", code], **kw)
