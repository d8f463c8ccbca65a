"""The one error type for bad user input: a preset, a study, an override or a CLI argument."""

from __future__ import annotations


class GradfenceInputError(Exception):
    """Bad input from a person; the message is one full sentence that says what to change."""
