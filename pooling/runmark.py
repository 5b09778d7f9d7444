"""The marker of a run folder, read by the writer of run folders (output.py) and by the readers of
folders of data (dask_stats.py): a run folder is pooling's output, never input.

Every run folder this program writes holds `.pooling-run`, one line of JSON with "written_by": "pooling"
(DEVELOPERS.md, "Run folders"). This module only reads it; output.py writes it.
"""

from __future__ import annotations

import json
from pathlib import Path

#: The marker file in every run folder this program writes (and in its hidden working folders).
MARKER = ".pooling-run"


def read_marker(folder) -> dict | None:
    """The marker of a folder this program wrote, or None (no marker, or not one of ours)."""
    try:
        with open(Path(folder) / MARKER, "rb") as fh:
            info = json.loads(fh.read(4096).decode("utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(info, dict) or info.get("written_by") != "pooling" or not isinstance(info.get("format"), int):
        return None
    return info
