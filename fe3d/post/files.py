"""Atomic file writing: a result file is either complete or absent, never half written."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path

__all__ = ["write_atomic", "write_text_atomic"]


def write_atomic(path: Path, writer: Callable[[Path], None]) -> None:
    """Call ``writer(tmp_path)`` then rename the temporary file onto ``path``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    os.close(fd)
    try:
        writer(Path(tmp))
        # mkstemp creates 0600 files; give results the usual permissions of new files
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_text_atomic(path: Path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"))
