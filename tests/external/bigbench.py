"""Task files from the BIG-bench source archive on the package registry (Apache-2.0).

Source: the ``bigbench==1.0.0`` sdist on PyPI, which carries
``bigbench/benchmark_tasks/<task>/task.json``. We only read JSON out of the archive; the
package is never installed or run. The archive (358 MB) is fetched once with pip into the
evalkit cache and the task files we use are extracted beside it.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tarfile
from pathlib import Path

ARCHIVE = "bigbench-1.0.0.tar.gz"
PREFIX = "bigbench-1.0.0/bigbench/benchmark_tasks/"


def cache_dir() -> Path:
    root = Path(os.environ.get("EVALKIT_CACHE", Path.home() / ".cache" / "evalkit"))
    d = root / "bigbench"
    d.mkdir(parents=True, exist_ok=True)
    return d


def _archive() -> Path:
    d = cache_dir()
    path = d / ARCHIVE
    if path.exists():
        return path
    # pip >= 24 refuses this sdist's metadata (a direct-URL dependency) after downloading it;
    # the pip that `python -m venv` bundles with Python 3.11 (23.2) accepts it.
    cmd = [sys.executable, "-m", "pip", "download", "--quiet", "--no-deps",
           "--no-binary", ":all:", "--dest", str(d), "bigbench==1.0.0"]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if not path.exists():
        raise RuntimeError(
            "could not fetch the bigbench archive with pip (pip < 24 is needed for this sdist):\n"
            + proc.stderr[-2000:]
        )
    return path


def task_json(task: str) -> dict:
    """Return the parsed ``task.json`` of a BIG-bench task, e.g. ``object_counting`` or ``arithmetic/2_digit_addition``."""
    out = cache_dir() / "tasks" / task / "task.json"
    if not out.exists():
        wanted = PREFIX + task + "/task.json"
        with tarfile.open(_archive(), "r:gz") as tar:
            member = tar.getmember(wanted)
            data = tar.extractfile(member).read()
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = out.with_suffix(".tmp")
        tmp.write_bytes(data)
        tmp.replace(out)
    return json.loads(out.read_text())
