"""Where the data files a case names may come from, and how they are read.

A data file (borehole picks, surface points, grids, release histories, plume points,
conductivity fields, an imported mesh) must be a regular file (not a folder, a FIFO or a
device) no larger than a stated bound, inside the case folder and not reached through a
symbolic link, unless the case says ``[input] allow_outside_files = true``. Text files are
read as UTF-8; a file that is not text gives one line naming the file and the line, never
its content. Errors show a cell of a file only when it is a short plain word or number
(:func:`shown_cell`), so a line of some other file is never echoed.
"""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path

from fe3d.errors import CaseError

__all__ = ["MAX_CASE_FILE_BYTES", "MAX_DATA_FILE_BYTES", "MAX_MESH_FILE_BYTES",
           "checked_file", "checked_mesh_file", "located", "read_text", "shown_cell"]

MiB = 1024 * 1024

MAX_DATA_FILE_BYTES = 64 * MiB
"""Largest text data file read [bytes]: 64 MiB holds about two million rows of picks or
points, far more than a site model uses (common practice, no source)."""

MAX_MESH_FILE_BYTES = 4096 * MiB
"""Largest mesh or cell-field file (.vtu, .msh) read [bytes]: a mesh of ~10 M cells."""

MAX_CASE_FILE_BYTES = 16 * MiB
"""Largest case file read [bytes] (the demo case is 7 kB)."""

_PLAIN_CELL = re.compile(r"^[A-Za-z0-9_.+\-]{1,64}$")

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO (named pipe)"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISSOCK, "a socket"))


def shown_cell(text: str) -> str:
    """A cell of a data file as an error shows it: itself when it is a short plain word or
    number, otherwise only its length."""
    return text if _PLAIN_CELL.match(text) else f"(a cell of {len(text)} characters)"


def located(base_dir: Path, name: str, *, key: str, allow_outside: bool) -> Path:
    """The path of data file ``name`` (relative to ``base_dir``, the case folder).

    Without ``allow_outside``, a file outside ``base_dir`` or reached through a symbolic
    link (the file or a folder on the way) is refused with one line naming ``key``.
    """
    base = Path(os.path.abspath(base_dir))
    full = Path(os.path.abspath(base / name))
    if allow_outside:
        return full
    try:
        inner = full.relative_to(base)
    except ValueError:
        raise CaseError(key, name, "lies outside the case folder; copy it into the case "
                        "folder or set [input] allow_outside_files = true") from None
    if full.resolve() != base.resolve() / inner:
        raise CaseError(key, name, "is reached through a symbolic link; copy the file into "
                        "the case folder or set [input] allow_outside_files = true")
    return full


def checked_file(path: Path, *, key: str, shown: str, limit: int = MAX_DATA_FILE_BYTES,
                 ) -> os.stat_result:
    """Refuse, naming ``key`` and showing ``shown``, a ``path`` that cannot be read, is not
    a regular file or is larger than ``limit`` [bytes]; returns its status."""
    try:
        info = path.stat()
    except OSError as exc:
        raise CaseError(key, shown, f"cannot be read ({exc.strerror})") from None
    if not stat.S_ISREG(info.st_mode):
        kind = next((what for test, what in _KINDS if test(info.st_mode)), "not a file")
        raise CaseError(key, shown, f"must be a regular file, not {kind}")
    if info.st_size > limit:
        raise CaseError(key, shown, f"holds {info.st_size:,} bytes; at most {limit // MiB:,} "
                        "MiB is read")
    return info


_MESH_SIGNATURES = {".vtu": ((b"<?xml", b"<VTKFile"), "a VTK XML file (<?xml or <VTKFile)"),
                    ".vtk": ((b"# vtk DataFile",), "a legacy VTK file (# vtk DataFile)"),
                    ".msh": ((b"$MeshFormat", b"$NOD"), "a gmsh file ($MeshFormat)")}
"""How the mesh formats fe3d names begin (after any white space, and a UTF-8 byte-order
mark for XML): a file that begins otherwise is not read."""


def checked_mesh_file(path: Path, *, key: str, shown: str) -> None:
    """:func:`checked_file` with the mesh bound, and a .vtu, .vtk or .msh file must begin as
    its format does (so that garbage is one line here, not a failure inside a reader)."""
    checked_file(path, key=key, shown=shown, limit=MAX_MESH_FILE_BYTES)
    known = _MESH_SIGNATURES.get(path.suffix.lower())
    if known is None:
        return
    try:
        with path.open("rb") as fh:
            head = fh.read(256).lstrip().removeprefix(b"\xef\xbb\xbf")
    except OSError as exc:
        raise CaseError(key, shown, f"cannot be read ({exc.strerror})") from None
    starts, what = known
    if not head.startswith(starts):
        raise CaseError(key, shown, f"is not {what}: its first bytes are not those of the "
                        "format its name ends with")


def read_text(path: Path, *, key: str, shown: str | None = None,
              limit: int = MAX_DATA_FILE_BYTES) -> str:
    """The text of a regular UTF-8 file of at most ``limit`` bytes (:func:`checked_file`).

    Bytes that are not UTF-8, or a NUL byte, give one line naming ``key``, the file and the
    line number where they occur, without the content.
    """
    shown = path.name if shown is None else shown
    checked_file(path, key=key, shown=shown, limit=limit)
    try:
        with path.open("rb") as fh:
            data = fh.read(limit + 1)
    except OSError as exc:
        raise CaseError(key, shown, f"cannot be read ({exc.strerror})") from None
    if len(data) > limit:  # grew since it was checked
        raise CaseError(key, shown, f"holds more than {limit // MiB:,} MiB; at most that is read")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise CaseError(key, shown, f"is not UTF-8 text (line {line}): data files must be "
                        "text, e.g. CSV saved as UTF-8") from None
    nul = text.find("\0")
    if nul >= 0:
        line = text.count("\n", 0, nul) + 1
        raise CaseError(key, shown, f"holds a NUL byte (line {line}): data files must be text")
    return text
