"""What every benchmark prints first: the code it measured and the BLAS
setting it ran with (shared by the scripts in this folder)."""

from __future__ import annotations

import os

import hierarchy


def code_version() -> str:
    """The commit of the measured checkout, and whether hierarchy/ has
    uncommitted changes (figures then belong to the working tree)."""
    import subprocess

    root = os.path.dirname(os.path.dirname(os.path.abspath(hierarchy.__file__)))
    try:
        head = subprocess.run(["git", "-C", root, "rev-parse", "--short", "HEAD"],
                              capture_output=True, text=True, timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "-C", root, "status", "--porcelain", "--", "hierarchy"],
                               capture_output=True, text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "(not a git checkout)"
    if not head:
        return "(not a git checkout)"
    return head + (" + uncommitted changes in hierarchy/" if dirty else "")


def blas_header() -> list:
    """Lines saying which BLAS setting this process runs with."""
    lines = [f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', '(unset)')}"
             f"  OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', '(unset)')}"
             f"  cpus={os.cpu_count()}"]
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        lines.append("threadpoolctl not installed: BLAS library and threads not reported")
        return lines
    infos = [i for i in threadpool_info() if i.get("user_api") == "blas"]
    for info in infos:
        owner = os.path.basename(os.path.dirname(info.get("filepath", "")))
        lines.append(f"{info.get('user_api')}: {info.get('internal_api')} {info.get('version')} "
                     f"({owner}), {info.get('num_threads')} thread(s)")
    if len(infos) > 1 and any(i.get("num_threads", 1) > 1 for i in infos):
        lines.append("WARNING: several BLAS copies (numpy's and scipy's) with more than one thread each; "
                     "on a 2-core machine they contend and the exact evaluation can run many times "
                     "slower (benchmarks/README.md); use OPENBLAS_NUM_THREADS=1")
    return lines
