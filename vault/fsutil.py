"""Durability helpers shared by everything that writes files."""

from __future__ import annotations

import os
from pathlib import Path


def fsync_path(path: Path) -> None:
    """fsync a file or a directory (a directory's fsync makes renames in it durable)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
