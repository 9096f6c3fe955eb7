"""Helper of the benchmarks: the areamap package of another git revision, for old / new timings in one run."""

from __future__ import annotations

import subprocess
import tempfile
from pathlib import Path


def export_revision(ref: str) -> str:
    """Export the areamap package of git revision ``ref`` into a temporary folder; returns the folder.

    Put it first on PYTHONPATH to import that revision's ``areamap``; remove it when done.
    """
    repo = Path(__file__).resolve().parent.parent
    dest = tempfile.mkdtemp(prefix="areamap-old-")
    archive = subprocess.run(["git", "-C", str(repo), "archive", ref, "areamap"], check=True,
                             capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", dest], input=archive, check=True)
    return dest
