"""Helpers shared by the subcommands: loading designs, output folders, atomic writes."""

from __future__ import annotations

import os
import sys
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from ..errors import InputError
from ..spec import DesignSpec, default_design, load_design

__all__ = ["design_from", "output_dir", "atomic_path", "show_progress"]


def design_from(path: str | None) -> DesignSpec:
    """Load the design at ``path``, or the embedded demo design when ``path`` is None."""
    return default_design() if path is None else load_design(path)


def output_dir(path: str | os.PathLike) -> Path:
    """Create (if needed) and return an output folder, with a clear error if it cannot be."""
    out = Path(path)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: --out must be a folder, and a file of that name exists")
    out.mkdir(parents=True, exist_ok=True)
    return out


@contextmanager
def atomic_path(target: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; move it into place only on success.

    A reader never sees a half-written file, and a failure leaves any
    previous file untouched.
    """
    target = Path(target)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, target)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def show_progress() -> bool:
    """Progress bars only on a terminal (quiet in CI and pipes)."""
    return sys.stderr.isatty() and not os.environ.get("CI")
