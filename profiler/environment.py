"""What machine a measurement ran on: hardware, software, seeds and a calibration figure.

Captured once per study (in the process that writes the store) and once per measuring worker
(inside the worker, with its thread limits in force), so that times from different machines can
be compared and a reviewer can see what produced a number. Everything here is plain JSON data.

Nothing here raises for a missing piece of information: an unreadable ``/proc/cpuinfo``, a
missing ``git`` or a package that is not installed becomes ``None`` (or is left out), because the
environment describes a run and must never stop one.
"""

from __future__ import annotations

import os
import platform
import socket
import subprocess
import sys
import time
from importlib import metadata
from pathlib import Path
from typing import Any

__all__ = ["capture_environment", "worker_environment", "calibration_figure", "cpu_info",
           "git_revision", "package_versions", "CALIBRATION_KERNEL"]

#: Packages whose versions change what is measured.
_PACKAGES = ("infercost", "numpy", "scipy", "networkx", "pgmpy", "pandas", "matplotlib",
             "threadpoolctl", "typer", "rich", "dask", "distributed")

#: The fixed kernel behind the calibration figure (a description stored beside the figure).
CALIBRATION_KERNEL = "float64 256x256 matrix product, median of 15 runs, 1 BLAS thread"


def cpu_info() -> dict[str, Any]:
    """CPU model, flags, logical cores and cores this process may use (Linux ``/proc``; else platform)."""
    info: dict[str, Any] = {"model": platform.processor() or None, "flags": None,
                            "logical_cores": os.cpu_count()}
    try:
        info["usable_cores"] = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        info["usable_cores"] = os.cpu_count()
    try:
        text = Path("/proc/cpuinfo").read_text(errors="replace")
    except OSError:
        return info
    for line in text.splitlines():
        key, _, value = line.partition(":")
        key = key.strip()
        if key == "model name" and not info.get("model_name"):
            info["model"] = value.strip()
            info["model_name"] = value.strip()
        elif key in ("flags", "Features") and info["flags"] is None:
            info["flags"] = value.strip()
    info.pop("model_name", None)
    return info


def _memory_bytes() -> int | None:
    try:
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        return None


def package_versions() -> dict[str, str]:
    """Installed versions of the packages that matter to a measurement (absent ones left out)."""
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def git_revision(path: str | Path | None = None) -> dict[str, Any]:
    """``{"revision": sha or None, "dirty": bool or None}`` of the project checkout, if any.

    Runs ``git rev-parse HEAD`` and ``git status --porcelain`` with a short timeout; no git, no
    repository or a slow file system give ``None`` values rather than an error.
    """
    where = Path(path) if path is not None else Path(__file__).resolve().parent.parent
    result: dict[str, Any] = {"revision": None, "dirty": None}
    try:
        rev = subprocess.run(["git", "rev-parse", "HEAD"], cwd=where, capture_output=True,
                             text=True, timeout=5)
        if rev.returncode == 0:
            result["revision"] = rev.stdout.strip() or None
            status = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"],
                                    cwd=where, capture_output=True, text=True, timeout=5)
            if status.returncode == 0:
                result["dirty"] = bool(status.stdout.strip())
    except (OSError, subprocess.SubprocessError):
        pass
    return result


def calibration_figure(repeats: int = 15) -> dict[str, Any]:
    """Seconds of a fixed numpy kernel on this machine, to put times from machines side by side.

    The kernel is a 256 x 256 float64 matrix product (about 33.5 million floating-point
    operations) run under a one-thread BLAS limit; the median of ``repeats`` runs is quoted.
    Dividing a point's seconds by this figure gives a machine-normalised time. Takes ~20 ms.

    Returns
    -------
    dict
        ``{"kernel": description, "seconds": median, "seconds_min": min, "gflops": rate}``.
    """
    import numpy as np
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(np.random.SeedSequence([20240601]))
    a = rng.standard_normal((256, 256))
    b = rng.standard_normal((256, 256))
    times = []
    with threadpool_limits(limits=1):
        a @ b  # warm-up: first call pays for BLAS initialisation
        for _ in range(repeats):
            t0 = time.perf_counter_ns()
            a @ b
            times.append((time.perf_counter_ns() - t0) * 1e-9)
    times.sort()
    median = times[len(times) // 2]
    return {"kernel": CALIBRATION_KERNEL, "seconds": median, "seconds_min": times[0],
            "gflops": 2 * 256 ** 3 / median / 1e9 if median > 0 else None}


def _blas_info() -> list[dict[str, Any]]:
    try:
        from threadpoolctl import threadpool_info

        return [{k: v for k, v in d.items() if k in ("user_api", "internal_api", "prefix",
                                                     "version", "num_threads", "threading_layer",
                                                     "architecture", "filepath")}
                for d in threadpool_info()]
    except Exception:  # threadpoolctl inspects shared libraries; never let it stop a run
        return []


def capture_environment(*, seed: int | None = None, threads: int | None = None,
                        calibrate: bool = True) -> dict[str, Any]:
    """The environment of a study: machine, software, seed and calibration figure.

    Parameters
    ----------
    seed
        The study's seed (recorded, not used).
    threads
        BLAS/OpenMP threads the workers are limited to.
    calibrate
        Run the ~20 ms calibration kernel (:func:`calibration_figure`).

    Returns
    -------
    dict
        JSON-ready: ``host, os, python, cpu, memory_bytes, packages, blas, git, seed, threads,
        calibration, captured_at``.
    """
    import numpy as np  # noqa: F401  (imported so that threadpoolctl sees numpy's BLAS)

    env: dict[str, Any] = {
        "host": socket.gethostname(),
        "os": platform.platform(),
        "machine": platform.machine(),
        "python": sys.version.split()[0],
        "python_implementation": platform.python_implementation(),
        "cpu": cpu_info(),
        "memory_bytes": _memory_bytes(),
        "packages": package_versions(),
        "blas": _blas_info(),
        "git": git_revision(),
        "seed": seed,
        "threads": threads,
        "captured_at": time.time(),
    }
    if calibrate:
        try:
            env["calibration"] = calibration_figure()
        except Exception as exc:  # a broken BLAS must not hide the rest of the environment
            env["calibration"] = {"kernel": CALIBRATION_KERNEL, "seconds": None,
                                  "error": f"{type(exc).__name__}: {exc}"}
    return env


def worker_environment(*, threads: int, memory_limit_bytes: int | None,
                       baseline_vm_bytes: int | None) -> dict[str, Any]:
    """The environment seen from inside one measuring worker (after its limits are applied).

    Smaller than :func:`capture_environment` (no git, no package list): host, pid, CPU model,
    BLAS libraries with their thread counts as actually limited, the worker's address-space
    limit and baseline, thread variables, and the calibration figure measured in the worker.
    """
    env = {
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "python": sys.version.split()[0],
        "cpu_model": cpu_info().get("model"),
        "blas": _blas_info(),
        "threads": threads,
        "thread_variables": {k: os.environ.get(k) for k in
                             ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")},
        "memory_limit_bytes": memory_limit_bytes,
        "baseline_vm_bytes": baseline_vm_bytes,
    }
    try:
        env["calibration"] = calibration_figure()
    except Exception as exc:
        env["calibration"] = {"kernel": CALIBRATION_KERNEL, "seconds": None,
                              "error": f"{type(exc).__name__}: {exc}"}
    return env
