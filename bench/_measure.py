"""Run a command in a fresh process and record its wall time and the peak RSS of its tree."""

from __future__ import annotations

import subprocess
import sys
import time

import psutil


def measure(args: list[str], *, interval: float = 0.2, timeout: float = 7200) -> dict:
    """Wall seconds, peak summed RSS of the process and all its children, exit code, stdout."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    root = psutil.Process(proc.pid)
    peak = 0
    while proc.poll() is None:
        try:
            tree = [root, *root.children(recursive=True)]
            peak = max(peak, sum(p.memory_info().rss for p in tree if p.is_running()))
        except psutil.Error:
            pass
        if time.perf_counter() - t0 > timeout:
            proc.kill()
        time.sleep(interval)
    out, err = proc.communicate()
    if proc.returncode != 0:
        sys.stderr.write(err[-2000:])
    return {"seconds": time.perf_counter() - t0, "peak_rss": peak, "code": proc.returncode,
            "stdout": out}
