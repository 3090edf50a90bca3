"""The progress displays ``Job.wait`` drives: the text line, the log lines and the widget card.

The card is built from real ipywidgets objects; outside a kernel they have no front end to
talk to, which is enough to check its state and its "Abort job" button (the browser half of
the button is exercised by the lab extension, see tests/browser).
"""

from __future__ import annotations

import io
import time

import pytest

from jobdesk import phases
from jobdesk.progress import (
    BADGE_COLOURS, FAMILIES, CardProgress, LineProgress, LogProgress, Progress, format_elapsed,
)


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


def test_card_shows_state_and_its_abort_button_runs_the_hooks():
    card = CardProgress("seven bright sources", "0123abcd0123abcd")
    calls = []
    card.cancel_hooks.append(lambda: calls.append("abort"))
    try:
        assert card.button.description == "Abort job"   # the word every screen uses
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
        assert card.button.description == "Aborting…"
    finally:
        card.close("ABORTED")
    assert "ABORTED" in card.badge.value and card.button.layout.display == "none"
    assert not card._ticker.is_alive() or card._stop.is_set()


def test_card_shows_a_pulse_until_progress_is_known_then_real_bytes():
    card = CardProgress("a big download", "feed0123feed0123")
    try:
        card.update("EXECUTING", 1.0, None)
        # Nothing known: a pulse, no bar (a bar would read as percent done).
        assert card.bar.layout.display == "none" and card.pulse.layout.display != "none"
        values = set()
        for _ in range(3):
            time.sleep(CardProgress.TICK_SECONDS)
            values.add(card.bar.value)
        assert values == {0}, "the bar moved with no progress to show"
        card.transfer(250_000, 1_000_000)
        assert card.bar.layout.display != "none" and card.pulse.layout.display == "none"
        assert card.bar.value == 25
        assert card.amount.value == "downloading 250.0 kB of 1.0 MB (25 %)"
        card.transfer(1_000_000, 1_000_000)   # the last figure always shows
        assert card.bar.value == 100
    finally:
        card.close("COMPLETED")
    assert card.pulse.layout.display == "none" and card.bar.layout.display == "none"


def test_card_without_a_known_length_keeps_the_pulse_and_counts_bytes():
    card = CardProgress("a stream of unknown length")
    try:
        card.transfer(3_400_000, None)
        assert card.bar.layout.display == "none" and card.pulse.layout.display != "none"
        assert card.amount.value == "downloading 3.4 MB"
    finally:
        card.close("COMPLETED")


def test_line_progress_shows_the_download():
    out = io.StringIO()
    shown = LineProgress("big", stream=out)
    shown.update("COMPLETED", 3, None)
    shown.update("EXECUTING", 3, None)
    shown.transfer(500, 1000)
    assert "downloading 500 B of 1.0 kB (50 %)" in out.getvalue()


def _relative_luminance(hex_colour: str) -> float:
    # WCAG 2.1, definition "relative luminance": sRGB channels linearised (0.03928 threshold,
    # as the W3C text gives it), weighted 0.2126 R + 0.7152 G + 0.0722 B.
    channels = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def _contrast(a: str, b: str) -> float:
    # WCAG 2.1, definition "contrast ratio": (L1 + 0.05) / (L2 + 0.05), L1 the lighter.
    la, lb = sorted((_relative_luminance(a), _relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def test_contrast_formula_matches_the_standard_extremes():
    # WCAG 2.1: black on white is 21:1, a colour on itself 1:1.
    assert round(_contrast("#000000", "#ffffff"), 2) == 21.0
    assert _contrast("#777777", "#777777") == 1.0
    # #767676 on white is the lightest grey commonly quoted as passing AA (from memory: 4.54:1).
    assert 4.5 < _contrast("#767676", "#ffffff") < 4.6


def test_every_badge_passes_wcag_aa_and_pairs_a_shape_with_its_colour():
    from jobdesk.progress import _badge
    for family, (text, background) in BADGE_COLOURS.items():
        # WCAG 2.1 SC 1.4.3 (AA): at least 4.5:1 for normal-size text; the badge text is small.
        assert _contrast(text, background) >= 4.5, family
    # Every phase has a family (the UWS ones, ours, and UNREACHED from the start).
    assert set(FAMILIES) >= set(phases.UWS_PHASES) | {"UNSENT", "SUBMITTED", "LOST", "UNREACHED"}
    shapes = {FAMILIES[p]: _badge(p) for p in ("QUEUED", "EXECUTING", "COMPLETED", "ERROR",
                                                "ABORTED")}
    marks = {family: html.split("<span aria-hidden", 1)[1].split(">", 1)[0]
             for family, html in shapes.items()}
    assert len(set(marks.values())) == 5, "each family needs a shape of its own"
    assert BADGE_COLOURS["stopped"][0] != BADGE_COLOURS["failed"][0]   # an abort is not red
