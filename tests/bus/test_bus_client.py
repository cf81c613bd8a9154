"""What the bus client says to a person when a reply contradicts what was applied."""

from __future__ import annotations

from autotune.wire.bus import _mismatch_text


def test_a_mismatch_is_told_in_the_units_a_physicist_reads() -> None:
    """Detuning in kHz to 0.01 and velocity in m/s to 0.1 (the README's console units, common
    practice of the trade), not 16-digit floats."""
    assert _mismatch_text("detuning", -4060.123456789012, -4200.0) == \
        "detuning -4.06 kHz (applied -4.20 kHz)"
    assert _mismatch_text("velocity", 512.34, 509.2) == "velocity 512.3 m/s (applied 509.2 m/s)"


def test_a_mismatch_below_the_display_precision_shows_enough_digits_to_differ() -> None:
    """Two values that the console units print alike are shown with the digits that tell them
    apart."""
    text = _mismatch_text("velocity", 509.2004, 509.2)
    assert text == "velocity 509.2004 (applied 509.2)"


def test_a_set_point_missing_from_the_reply_is_named() -> None:
    """A reply without the applied set-point says it is missing."""
    assert _mismatch_text("velocity", None, 500.0) == "velocity missing (applied 500.0 m/s)"
