"""Runs that continue: how often a run saves a checkpoint, where the checkpoint of a stopped
run is found, and how SIGINT/SIGTERM stop a run with a checkpoint (``fe3d run --resume``).

A run keeps its checkpoint in ``checkpoint/`` inside its work folder
(:mod:`fe3d.transport.checkpoint`). A run stopped by Ctrl-C or SIGTERM is moved into place
marked ``interrupted`` (:mod:`fe3d.post.run_place`) and keeps it there; a run that was killed
outright (SIGKILL, power loss) leaves its hidden work folder ``.NAME.running-PID`` beside the
target, which ``--resume`` takes over before a new run would remove it. A finished run keeps
no checkpoint.
"""

from __future__ import annotations

import hashlib
import math
import os
import shutil
import signal
import threading
import zipfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from fe3d.case.schema import Case
from fe3d.errors import CaseError
from fe3d.post.run_place import process_alive  # one liveness test for run folders
from fe3d.transport.checkpoint import (
    CHECKPOINT_FOLDER,
    RESUME_KEY,
    Checkpoint,
    Checkpointer,
    RunInterrupted,
    read_checkpoint,
)
from fe3d.units import to_si

__all__ = ["DEFAULT_INTERVAL", "CheckpointInterval", "SavedRun", "case_fingerprint",
           "checkpoint_interval", "claim_saved_run", "stop_on_signals"]

INTERVAL_KEY = "--checkpoint-every"
"""What a bad checkpoint interval is named by: the command-line option that gives it."""


@dataclass(frozen=True)
class CheckpointInterval:
    """Save a checkpoint every ``steps`` accepted steps and/or every ``seconds`` of wall
    time [s], whichever comes first; neither: only when the run is stopped by a signal."""

    steps: int | None = None
    seconds: float | None = None


DEFAULT_INTERVAL = CheckpointInterval(seconds=600.0)
"""Every 10 minutes of wall time (common practice, no source: a lost interval costs at most
10 minutes, and a checkpoint at 1 M nodes takes well under a second, docs/performance.md)."""


def checkpoint_interval(text: str) -> CheckpointInterval:
    """``"500 steps"``, a wall-clock duration (``"10 min"``, ``"2 h"``) or ``"off"``; raises
    CaseError naming ``--checkpoint-every``."""
    words = text.strip().split()
    allowed = "a number of steps ('500 steps'), a duration ('10 min') or 'off'"
    if words == ["off"]:
        return CheckpointInterval()
    if len(words) == 2 and words[1] in ("step", "steps"):
        if words[0].isdigit() and int(words[0]) > 0:
            return CheckpointInterval(steps=int(words[0]))
        raise CaseError(INTERVAL_KEY, text, allowed)
    try:
        seconds = to_si(text, "time")
    except ValueError:
        raise CaseError(INTERVAL_KEY, text, allowed) from None
    if not seconds > 0:
        raise CaseError(INTERVAL_KEY, text, f"{allowed}, greater than zero")
    return CheckpointInterval(seconds=seconds)


def case_fingerprint(case: Case) -> str:
    """SHA-256 of the validated case (every value in SI units), hex."""
    return hashlib.sha256(case.model_dump_json().encode()).hexdigest()


@dataclass(frozen=True)
class SavedRun:
    """A stopped run to continue: the folder holding its files (the run folder, or a killed
    run's work folder taken over as ``.NAME.resume-PID``), its checkpoint, and whether the
    folder is a taken-over one (removed once the continued run is in place)."""

    folder: Path
    checkpoint: Checkpoint
    taken_over: bool

    @property
    def checkpoint_folder(self) -> Path:
        """The checkpoint's folder [path]."""
        return self.folder / CHECKPOINT_FOLDER


def claim_saved_run(case: Case, out_dir: Path) -> SavedRun:
    """The newest checkpoint of a run of ``out_dir``: in ``out_dir`` (a run stopped by a
    signal or that failed) or in the hidden work folder of a run that was killed, which is
    renamed ``.NAME.resume-PID`` so that no new run removes it. Raises CaseError naming
    ``--resume`` when there is none, when a run of ``out_dir`` is still going, or when the
    case changed since the checkpoint was saved."""
    shown = str(out_dir)
    candidates = [out_dir] if (out_dir / CHECKPOINT_FOLDER / "state.npz").is_file() else []
    hidden = [*out_dir.parent.glob(f".{out_dir.name}.running-*"),
              *out_dir.parent.glob(f".{out_dir.name}.resume-*")]  # a resume that stopped early
    for path in hidden:
        pid = path.name.rsplit("-", 1)[-1]
        if not (path / CHECKPOINT_FOLDER / "state.npz").is_file() or not pid.isdigit():
            continue
        if int(pid) != os.getpid() and process_alive(int(pid)):
            raise CaseError(RESUME_KEY, shown, f"a run of this folder is still going "
                            f"(process {pid}): stop it first")
        candidates.append(path)
    if not candidates:
        raise CaseError(RESUME_KEY, shown, "holds no checkpoint to continue from (a finished "
                        "run keeps none): run without --resume")
    newest = max(candidates, key=lambda p: (p / CHECKPOINT_FOLDER / "state.npz").stat().st_mtime)
    taken_over = newest != out_dir
    claimed = out_dir.parent / f".{out_dir.name}.resume-{os.getpid()}"
    if taken_over and newest != claimed:
        if claimed.exists():
            shutil.rmtree(claimed)
        newest = newest.rename(claimed)
    try:
        saved = read_checkpoint(newest / CHECKPOINT_FOLDER)
    except (OSError, ValueError, KeyError, zipfile.BadZipFile) as exc:
        raise CaseError(RESUME_KEY, shown, f"its checkpoint cannot be read ({exc}): run "
                        "again from the start (--overwrite)") from None
    assert saved is not None  # the file was just seen
    checkpoint, case_print = saved
    if case_print != case_fingerprint(case):
        raise CaseError(RESUME_KEY, shown, "the case changed since its checkpoint was saved: "
                        "run again from the start (--overwrite)")
    return SavedRun(folder=newest, checkpoint=checkpoint, taken_over=taken_over)


@contextmanager
def stop_on_signals(keeper: Checkpointer) -> Iterator[None]:
    """While the block runs, SIGINT and SIGTERM stop the run: during the transport
    (``keeper.listening``) at the end of the current step with a checkpoint, otherwise (or
    at a second signal) at once, by :class:`RunInterrupted`. Only in the main thread (the
    only one that receives signals); elsewhere a no-op."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def ask(signum: int, _frame: object) -> None:
        if keeper.listening and keeper.stop_signal is None:
            keeper.stop_signal = signum
            return
        raise RunInterrupted(signum, math.nan, None)

    before = {s: signal.signal(s, ask) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for s, handler in before.items():
            signal.signal(s, handler)
