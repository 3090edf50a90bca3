"""The progress displays ``Job.wait`` drives: the text line, the log lines and the widget card.

The card is built from real ipywidgets objects; outside a kernel they have no front end to
talk to, which is enough to check its state and its Cancel button (the browser half of Cancel
is exercised by the lab extension, see tests/browser).
"""

from __future__ import annotations

import io
import time

import pytest

from jobdesk.progress import CardProgress, LineProgress, LogProgress, Progress, format_elapsed


@pytest.mark.parametrize("seconds, words", [
    (0, "0 s"), (59.9, "59 s"), (60, "1 min 00 s"), (187, "3 min 07 s"), (7500, "2 h 05 min"),
])
def test_elapsed_words(seconds, words):
    assert format_elapsed(seconds) == words


def test_log_progress_writes_one_line_per_phase():
    out = io.StringIO()
    shown = LogProgress("cone around the pole", "ab12", stream=out)
    shown.update("QUEUED", 0.5, None)
    shown.update("QUEUED", 1.5, None)
    shown.update("EXECUTING", 3.0, None)
    shown.update("COMPLETED", 4.0, 1200)
    shown.close("COMPLETED")
    lines = out.getvalue().splitlines()
    assert [line.split(": ")[-1].split(" · ")[0] for line in lines[:3]] == \
        ["QUEUED", "EXECUTING", "COMPLETED"]
    assert lines[-1].endswith("COMPLETED · 4 s · 1,200 rows")


def test_a_wait_that_stops_early_says_the_job_goes_on():
    out = io.StringIO()
    shown = LineProgress("slow scan", stream=out)
    shown.update("EXECUTING", 12, None)
    shown.close()  # interrupted: no final phase
    text = out.getvalue()
    assert "\r" in text and "the job goes on" in text


def test_outside_a_kernel_the_display_is_text():
    assert not isinstance(Progress.for_environment("x"), CardProgress)


def test_card_shows_state_and_its_cancel_button_runs_the_hooks():
    card = CardProgress("seven bright sources", "0123abcd0123abcd")
    calls = []
    card.cancel_hooks.append(lambda: calls.append("abort"))
    try:
        assert "jobdesk-cancel" in card.button._dom_classes
        assert "jobdesk-job-0123abcd0123abcd" in card.button._dom_classes
        card.update("EXECUTING", 5.0, 300, note="reading")
        assert "EXECUTING" in card.badge.value
        assert card.count.value == "300 rows" and card.message.value == "reading"
        before = card.clock.value
        time.sleep(CardProgress.TICK_SECONDS * 2.5)  # the clock moves between updates
        assert card.clock.value != before
        assert not card.cancelled
        card.button.click()
        card.button.click()
        assert card.cancelled and calls == ["abort"] and card.button.disabled
    finally:
        card.close("ABORTED")
    assert "ABORTED" in card.badge.value and card.button.layout.display == "none"
    assert not card._ticker.is_alive() or card._stop.is_set()
