"""The transport's progress line shows the last step and the steps still to come at it, so a
run whose plume-following steps are short says so from its first steps (exact arithmetic:
steps of 0.1 yr over 30 yr leave 299 after the first)."""

from __future__ import annotations

from fe3d.cli import StepsSeen

YEAR = 365.25 * 86400.0


def test_progress_line_gives_the_last_step_and_the_steps_left() -> None:
    seen = StepsSeen("yr")
    assert seen.info(0.0, 30 * YEAR) == "t = 0 / 30 yr"  # the stage's start: no step yet
    assert seen.info(0.1 * YEAR, 30 * YEAR) == \
        "t = 0.1 / 30 yr, step 0.1 yr (1 steps; 299 more at this step)"
    seen.info(0.2 * YEAR, 30 * YEAR)
    assert seen.info(0.25 * YEAR, 30 * YEAR) == \
        "t = 0.25 / 30 yr, step 0.05 yr (3 steps; 595 more at this step)"


def test_a_resumed_run_shows_no_step_before_its_first() -> None:
    """A resumed run reports its checkpoint's time first: not a step of that length."""
    seen = StepsSeen("d")
    assert seen.info(40 * 86400.0, 100 * 86400.0) == "t = 40 / 100 d"
    assert seen.info(41 * 86400.0, 100 * 86400.0) == \
        "t = 41 / 100 d, step 1 d (1 steps; 59 more at this step)"
