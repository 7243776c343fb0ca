"""Output work done on a second thread while the main thread computes.

The transport's and the flow's compiled kernels release the GIL, and the machines fe3d
runs on have at least two cores, so figures and files that depend only on earlier stages
(the flow's figures while the transport runs, the 3D view while the plan maps are drawn)
can be written beside the computation instead of after it. Only one thread draws with
matplotlib at a time: a job handed to :class:`Beside` owns whatever library it uses until
:meth:`Beside.result` returns.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Generic, TypeVar

__all__ = ["Beside"]

T = TypeVar("T")


class Beside(Generic[T]):
    """``job()`` started at once on its own thread; :meth:`result` waits for it and
    returns its value or raises its error; :attr:`seconds` and :attr:`cpu_seconds` are its
    wall-clock and its thread's processor time [s] once it has ended."""

    def __init__(self, job: Callable[[], T], *, name: str) -> None:
        self._job = job
        self._value: T | None = None
        self._error: BaseException | None = None
        self.seconds = 0.0
        self.cpu_seconds = 0.0
        self._thread = threading.Thread(target=self._run, name=f"fe3d {name}", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        started, cpu = time.perf_counter(), time.thread_time()
        try:
            self._value = self._job()
        except BaseException as exc:  # handed to the waiting thread by result()
            self._error = exc
        finally:
            self.seconds = time.perf_counter() - started
            self.cpu_seconds = time.thread_time() - cpu

    def wait(self) -> None:
        """Wait for the job to end, whatever its outcome (before the folder it writes in
        is moved, when the main work failed)."""
        self._thread.join()

    def result(self) -> T:
        """The job's value, after waiting for it; its error is raised here."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._value  # type: ignore[return-value]  # set when no error was kept
