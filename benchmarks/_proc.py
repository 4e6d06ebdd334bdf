"""Run one command in a fresh child process and measure it: wall time and peak memory.

Shared by the benchmark scripts in this folder (not part of the package). Peak memory is
given two ways, because PyMC's default sampler forks worker processes:

- ``tree_peak_mb``: the largest sum of resident set sizes over the child and all of its
  descendants, sampled every ``interval`` seconds with psutil (shared pages of forked workers
  are counted once per process, so this can overstate; a spike shorter than the interval can
  be missed);
- ``maxrss_mb``: the peak resident set of the largest single process among the child and its
  waited-for descendants, as ``/usr/bin/time -f %M`` reports it (the kernel's ``ru_maxrss``).
  The command runs under ``/usr/bin/time`` because ``ru_maxrss`` survives ``exec``: a child
  forked straight from a large parent would report the parent's size. Without
  ``/usr/bin/time`` it falls back to ``os.wait4`` on the child, with that caveat.

A run over ``limit`` seconds, or whose process tree grows past ``memory_limit_mb`` (so that a
too-large case cannot exhaust a shared machine), is killed (its whole process group, which
this module started) and returned with ``finished=False`` and ``killed_for`` "time" or "memory".
"""

from __future__ import annotations

import os
import signal
import subprocess
import tempfile
import time
from dataclasses import asdict, dataclass

import psutil

TIME = "/usr/bin/time"


@dataclass
class Measured:
    """Outcome of one measured child process."""

    finished: bool
    killed_for: str | None
    returncode: int | None
    wall_s: float
    tree_peak_mb: float
    maxrss_mb: float
    stdout: str
    stderr: str

    def as_record(self) -> dict:
        out = asdict(self)
        out["stdout"] = self.stdout[-4000:]
        out["stderr"] = self.stderr[-4000:]
        return out


def _tree_rss(proc: psutil.Process) -> int:
    total = 0
    try:
        members = [proc, *proc.children(recursive=True)]
    except psutil.Error:
        return 0
    for member in members:
        try:
            total += member.memory_info().rss
        except psutil.Error:
            continue
    return total


def run_measured(
    cmd: list[str],
    *,
    limit: float,
    interval: float = 0.1,
    memory_limit_mb: float | None = None,
    env: dict | None = None,
    log_path: str | None = None,
) -> Measured:
    """Run ``cmd`` with a wall-time ``limit`` (seconds); never raises on a failing command."""
    # Files, not pipes: a chatty child would block on a full pipe while we only poll it.
    if log_path:
        out_file = open(log_path + ".out", "w+")  # noqa: SIM115
        err_file = open(log_path + ".err", "w+")  # noqa: SIM115
    else:
        out_file = tempfile.TemporaryFile("w+")  # noqa: SIM115
        err_file = tempfile.TemporaryFile("w+")  # noqa: SIM115
    rss_file = None
    if os.path.exists(TIME):
        rss_file = tempfile.NamedTemporaryFile("w+", suffix=".rss")  # noqa: SIM115
        cmd = [TIME, "-f", "%M", "-o", rss_file.name, *cmd]
    start = time.perf_counter()
    child = subprocess.Popen(
        cmd,
        stdout=out_file,
        stderr=err_file,
        text=True,
        env=env,
        start_new_session=True,  # own process group, so a timeout kills the workers too
    )
    watcher = psutil.Process(child.pid)
    peak = 0
    finished = True
    killed_for = None
    status = None
    rusage = None
    while True:
        pid, status, rusage = os.wait4(child.pid, os.WNOHANG)
        if pid == child.pid:
            break
        peak = max(peak, _tree_rss(watcher))
        if time.perf_counter() - start > limit:
            killed_for = "time"
        elif memory_limit_mb is not None and peak > memory_limit_mb * 2**20:
            killed_for = "memory"
        if killed_for:
            finished = False
            os.killpg(child.pid, signal.SIGKILL)
            _, status, rusage = os.wait4(child.pid, 0)
            break
        time.sleep(interval)
    wall = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)  # tell Popen it has been reaped
    out_file.seek(0)
    err_file.seek(0)
    stdout, stderr = out_file.read(), err_file.read()
    out_file.close()
    err_file.close()
    maxrss_kb = rusage.ru_maxrss
    if rss_file is not None:
        text = rss_file.read().strip().splitlines()
        rss_file.close()
        # A killed run leaves no figure; a failed command adds a "Command exited" line first.
        maxrss_kb = int(text[-1]) if text and text[-1].isdigit() else float("nan")
    return Measured(
        finished=finished,
        killed_for=killed_for,
        returncode=child.returncode if finished else None,
        wall_s=wall,
        tree_peak_mb=peak / 2**20,
        maxrss_mb=maxrss_kb / 1024,
        stdout=stdout,
        stderr=stderr,
    )
