"""Helpers shared by the benchmark scripts: run a contender as a child process and measure it.

Every contender runs in its own process so its peak memory is its own: ``os.wait4`` returns the
child's resource usage, whose ``ru_maxrss`` is the child's peak resident set (KiB on Linux).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
PYTHON = sys.executable
GiB = 2**30
MiB = 2**20
CHILD_FLAG = "SHARDRANK_BENCH_CHILD"


def refuse_recursion(is_contender: bool) -> None:
    """Stop a benchmark started inside one of its own children (a contender that lost its flag)."""
    if os.environ.get(CHILD_FLAG) and not is_contender:
        raise SystemExit("bench: refusing to run the whole benchmark inside a measured child")


@dataclass
class Measured:
    """Wall time, peak RSS and output of one child process."""

    name: str
    seconds: float
    peak_bytes: int
    returncode: int
    stdout: str
    stderr: str

    def check(self) -> Measured:
        if self.returncode != 0:
            raise SystemExit(
                f"{self.name} failed with exit {self.returncode}:\n{self.stderr[-3000:]}"
            )
        return self


def run_measured(
    name: str, cmd: list[str], env: dict[str, str] | None = None, cwd: Path | None = None
) -> Measured:
    """Run ``cmd``; return its wall time and peak RSS (from wait4's rusage of that child)."""
    full_env = dict(os.environ)
    full_env.update(env or {})
    full_env[CHILD_FLAG] = "1"  # a child that is not a contender refuses to start (no recursion)
    t0 = time.perf_counter()
    p = subprocess.Popen(
        cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=full_env, cwd=cwd, text=True
    )
    # read both pipes on threads so a chatty child cannot block on a full pipe
    out: list[str] = []
    err: list[str] = []
    import threading

    t_out = threading.Thread(target=lambda: out.append(p.stdout.read() if p.stdout else ""))
    t_err = threading.Thread(target=lambda: err.append(p.stderr.read() if p.stderr else ""))
    t_out.start()
    t_err.start()
    _pid, status, usage = os.wait4(p.pid, 0)
    seconds = time.perf_counter() - t0
    t_out.join()
    t_err.join()
    p.returncode = os.waitstatus_to_exitcode(status)
    return Measured(name, seconds, usage.ru_maxrss * 1024, p.returncode, "".join(out), "".join(err))


def load_average() -> str:
    """The 1, 5 and 15 minute load averages (other engineers share this machine)."""
    a, b, c = os.getloadavg()
    return f"{a:.2f} {b:.2f} {c:.2f}"


def machine_facts() -> str:
    import psutil

    return (
        f"{os.cpu_count()} cores, {psutil.virtual_memory().total / GiB:.1f} GiB RAM, "
        f"load average {load_average()}"
    )


def dir_bytes(path: Path) -> int:
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())


def fresh_dir(path: Path) -> Path:
    shutil.rmtree(path, ignore_errors=True)
    path.mkdir(parents=True)
    return path


def table(rows: list[list[str]], header: list[str]) -> str:
    """A plain text table with right-aligned numeric columns."""
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    lines = ["  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))]
    lines.append("  ".join("-" * w for w in widths))
    for r in rows:
        lines.append(
            "  ".join(
                str(c).rjust(w) if i else str(c).ljust(w)
                for i, (c, w) in enumerate(zip(r, widths, strict=True))
            )
        )
    return "\n".join(lines)
