"""The machine a run was measured on, and whole-process timing of child processes.

Whole-process figures (start-up included) come from timing a child process from spawn to
exit; its peak resident set size comes from the kernel's accounting of that child
(``wait4``), so the harness itself never adds to it.
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PY = sys.executable


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def load_average() -> list[float]:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return []


def machine() -> dict:
    """What the figures were measured on (they are ratios, but the table says where)."""
    mem_kb = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                mem_kb = int(line.split()[1])
    except OSError:
        pass
    return {
        "platform": platform.platform(),
        "cpu": cpu_model(),
        "cores": os.cpu_count(),
        "memory_gb": round(mem_kb / 1024 / 1024, 1) if mem_kb else None,
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "mosquitto": mosquitto_version(),
    }


def mosquitto_version() -> str | None:
    from .broker import MOSQUITTO
    if not os.access(MOSQUITTO, os.X_OK):
        return None
    try:
        r = subprocess.run([MOSQUITTO, "-h"], capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.TimeoutExpired):
        return None
    first = (r.stdout or r.stderr).splitlines()[:1]
    return first[0].replace("mosquitto version", "").strip() if first else None


def source_version() -> dict:
    """The commit measured, and whether hemostream/ differed from it (work in progress)."""
    def git(*args: str) -> str:
        try:
            r = subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True,
                               timeout=10)
            return r.stdout.strip() if r.returncode == 0 else ""
        except (OSError, subprocess.TimeoutExpired):
            return ""
    import hashlib
    changed = git("status", "--porcelain", "--", "hemostream")
    head = git("rev-parse", "HEAD")
    diff = git("diff", "HEAD", "--", "hemostream") if changed else ""
    tree = git("rev-parse", "HEAD:hemostream")
    return {"commit": head[:7] or None, "hemostream_modified": bool(changed),
            #: identifies the code measured: hemostream/'s tree and any uncommitted change
            "code": hashlib.sha1((tree + diff).encode()).hexdigest()[:12]}


def child_env() -> dict:
    env = dict(os.environ)
    env.pop("HEMOSTREAM_MQTT_PASSWORD", None)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env.setdefault("PYTHONHASHSEED", "0")
    return env


@dataclass
class Measured:
    """One child process run to completion."""

    args: list[str]
    returncode: int
    seconds: float            # wall time, spawn to exit
    max_rss_kb: int           # peak resident set size of that child
    user_s: float
    sys_s: float
    stdout: str
    stderr: str

    def check(self) -> "Measured":
        if self.returncode != 0:
            raise RuntimeError(f"{' '.join(self.args)} exited with {self.returncode}:\n"
                               f"{self.stdout[-1000:]}{self.stderr[-3000:]}")
        return self


def run_measured(args: list[str], timeout: float = 3600.0, cwd: Path = ROOT) -> Measured:
    """Run ``args`` to completion; wall time from spawn to exit and the child's own rusage."""
    out_path = Path(os.environ.get("TMPDIR", "/tmp")) / f"hemobench-{os.getpid()}-{time.monotonic_ns()}"
    with open(f"{out_path}.out", "w+b") as out, open(f"{out_path}.err", "w+b") as err:
        t0 = time.perf_counter()
        p = subprocess.Popen(args, cwd=cwd, env=child_env(), stdout=out, stderr=err)
        deadline = time.monotonic() + timeout
        while True:
            pid, status, ru = os.wait4(p.pid, os.WNOHANG)
            if pid == p.pid:
                break
            if time.monotonic() > deadline:
                p.kill()
                os.wait4(p.pid, 0)
                raise RuntimeError(f"{' '.join(args)} did not finish in {timeout:.0f} s")
            time.sleep(0.002)
        seconds = time.perf_counter() - t0
        p.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        o, e = out.read().decode(errors="replace"), err.read().decode(errors="replace")
    for suffix in (".out", ".err"):
        try:
            os.unlink(f"{out_path}{suffix}")
        except OSError:
            pass
    return Measured(args, p.returncode, seconds, ru.ru_maxrss, ru.ru_utime, ru.ru_stime, o, e)


def remove_db(path: Path) -> None:
    for suffix in ("", "-wal", "-shm", "-journal"):
        try:
            os.unlink(f"{path}{suffix}")
        except FileNotFoundError:
            pass
