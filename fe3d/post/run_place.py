"""Where a run writes: one folder is one run.

A run works in a fresh hidden folder beside its target and, when it ends (finished, failed
or interrupted), replaces the target as a whole: a folder never mixes the files of two runs,
and an earlier run's report never stands beside a later run's fields. ``run.json`` (the
manifest) says which state the run ended in and lists every file with its size and SHA-256.
A target that holds anything but an earlier run of fe3d is refused; an earlier run is
replaced only when asked (``overwrite``); a folder that holds the case's input files is
never a target.

Where a run may write: ``--out`` (the user's own choice on the command line) may name any
folder; a run folder named in the case file (``output.folder``) must be a relative path
below the folder fe3d is started from, without ``..`` or ``~`` (checked when the case is
read, :mod:`fe3d.case.schema`), since a case file may come from someone else. Every file a
run writes lies inside its run folder.

When a file cannot be written (disk full, a read-only folder), the run fails with one line:
either its folder is moved into place with ``run.json`` saying ``failed``, or, when not even
the manifest can be written, the target keeps what it held and the hidden work folder stays
beside it until the next run of that target removes it.
"""

from __future__ import annotations

import datetime
import hashlib
import json
import os
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Literal

from fe3d import __version__
from fe3d.errors import CaseError
from fe3d.post.files import write_text_atomic

__all__ = ["MANIFEST", "RunState", "check_target", "move_into_place", "process_alive",
           "remove_stale_folders", "work_folder", "write_manifest"]

MANIFEST = "run.json"

MESH_FILES = frozenset({"mesh.msh", "mesh.vtu", "mesh.npz", "mesh.json"})
"""What ``fe3d mesh`` writes: a folder of these alone may be replaced by a run."""

OUT_KEY = "--out"
"""What a refused target is named by: the command-line option that gives it."""

RunState = Literal["running", "finished", "failed", "interrupted"]


def _is_inside(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


def check_target(out_dir: Path, *, overwrite: bool, inputs: Sequence[Path] = ()) -> None:
    """Refuse, with one line naming ``--out``, a target that is a file, that holds one of
    the ``inputs`` (the case file and the files it reads), that holds anything but an
    earlier fe3d run or the mesh files of ``fe3d mesh``, or either of those without
    ``overwrite``."""
    shown, key = str(out_dir), OUT_KEY
    if out_dir.exists() and not out_dir.is_dir():
        raise CaseError(key, shown, "must be a folder, not a file")
    for path in inputs:
        if _is_inside(path, out_dir):
            raise CaseError(key, shown, f"holds the input file {path.name}: choose a "
                            "folder of its own for the run (inputs are never overwritten)")
    if not out_dir.is_dir() or not any(out_dir.iterdir()):
        return
    names = {p.name for p in out_dir.iterdir()}
    mesh_folder = "mesh.json" in names and names <= MESH_FILES
    if not (out_dir / MANIFEST).is_file() and not mesh_folder:
        raise CaseError(key, shown, "is not empty and holds no earlier fe3d run "
                        f"({MANIFEST}) or mesh: choose an empty or new folder")
    if not overwrite:
        what = "a mesh of fe3d mesh" if mesh_folder else "an earlier run"
        raise CaseError(key, shown, f"holds {what}; give --overwrite to replace it as a "
                        "whole")


def process_alive(pid: int) -> bool:
    """Whether a process ``pid`` runs on this machine (the owner of a work folder)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def remove_stale_folders(out_dir: Path) -> list[Path]:
    """Remove the hidden folders a run of ``out_dir`` leaves beside it when it cannot finish
    (``.NAME.running-PID`` when even its manifest could not be written, e.g. on a full
    disk; ``.NAME.replaced-PID`` when the earlier run could not be removed) whose process
    has ended; returns them. A folder of a process still running is left alone."""
    removed = []
    for kind in ("running", "replaced"):
        for path in out_dir.parent.glob(f".{out_dir.name}.{kind}-*"):
            pid = path.name.rsplit("-", 1)[-1]
            if pid.isdigit() and int(pid) != os.getpid() and not process_alive(int(pid)):
                shutil.rmtree(path, ignore_errors=True)
                removed.append(path)
    return removed


def work_folder(out_dir: Path) -> Path:
    """A fresh hidden folder beside ``out_dir`` (same file system, so that the move into
    place is a rename); the hidden folders of earlier runs that could not finish are removed
    first (:func:`remove_stale_folders`)."""
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    remove_stale_folders(out_dir)
    work = out_dir.parent / f".{out_dir.name}.running-{os.getpid()}"
    if work.exists():
        shutil.rmtree(work)
    work.mkdir()
    return work


def write_manifest(folder: Path, state: RunState, *, detail: str = "") -> Path:
    """``run.json`` in ``folder``: the state, fe3d's version, the time [UTC], ``detail`` (the
    one-line reason of a failure) and every other file with its size [bytes] and SHA-256,
    those in subfolders (an interrupted run's ``checkpoint/``) by their path from
    ``folder`` with forward slashes; hidden files and folders (temporary files) are left
    out."""
    files = []
    for path in sorted(p for p in folder.rglob("*") if p.is_file() and p != folder / MANIFEST
                       and not any(part.startswith(".")
                                   for part in p.relative_to(folder).parts)):
        digest = hashlib.sha256()
        with path.open("rb") as fh:
            for block in iter(lambda fh=fh: fh.read(1 << 20), b""):
                digest.update(block)
        files.append({"name": path.relative_to(folder).as_posix(),
                      "bytes": path.stat().st_size, "sha256": digest.hexdigest()})
    data = {"fe3d": __version__, "state": state, "detail": detail,
            "written": datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds"),
            "files": files}
    path = folder / MANIFEST
    write_text_atomic(path, json.dumps(data, indent=2) + "\n")
    return path


def move_into_place(work: Path, out_dir: Path) -> None:
    """Replace ``out_dir`` (if any) by ``work`` as a whole: two renames, then the earlier
    folder is removed."""
    old = None
    if out_dir.exists():
        old = out_dir.parent / f".{out_dir.name}.replaced-{os.getpid()}"
        if old.exists():
            shutil.rmtree(old)
        out_dir.rename(old)
    work.rename(out_dir)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
