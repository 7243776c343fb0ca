"""Output work on a second thread (fe3d.post.beside.Beside): its value, its error and its
time reach the thread that waits for it. No numerical reference: these are the contract's
three promises, checked directly."""

from __future__ import annotations

import threading
import time

import pytest

from fe3d.post.beside import Beside


def test_result_is_the_jobs_value_computed_on_another_thread() -> None:
    def job() -> str:
        time.sleep(0.05)
        return threading.current_thread().name

    work = Beside(job, name="figures")
    assert work.result() == "fe3d figures"
    assert work.seconds >= 0.05  # its own wall-clock time, measured on its thread
    assert 0.0 <= work.cpu_seconds <= work.seconds  # one thread's processor time, asleep


def test_the_jobs_error_is_raised_by_result_not_by_wait() -> None:
    error = ValueError("no figure")

    def job() -> None:
        raise error

    work = Beside(job, name="figures")
    work.wait()  # a failed main stage waits without being masked by this error
    with pytest.raises(ValueError, match="no figure") as caught:
        work.result()
    assert caught.value is error
