"""Atomic file writes: a reader, or a rerun after a crash, never sees half a file."""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

__all__ = ["write_json", "write_text"]


def write_text(path: str | os.PathLike[str], text: str) -> None:
    """Write text atomically (temporary file beside it, fsync, rename)."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def write_json(path: str | os.PathLike[str], data: Any) -> None:
    """Write JSON atomically; NaN and infinity are refused (they are not JSON)."""
    write_text(path, json.dumps(data, indent=1, sort_keys=False, allow_nan=False))
