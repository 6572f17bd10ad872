"""How a statistic says it cannot be computed.

Bad input (wrong shapes, NaN, probabilities outside [0, 1]) raises
``ValueError``. A statistic that is undefined for valid input (one class only,
too few rows, zero variance) raises :class:`Undefined` with a short reason
code, so callers can report ``null`` with the reason instead of a made-up
number.
"""

from __future__ import annotations


class Undefined(Exception):
    """The statistic has no value for this (valid) input.

    Parameters
    ----------
    reason : str
        A short snake_case code, e.g. ``"one_class_only"``, ``"too_few_rows"``.
    detail : str
        A sentence for people.
    """

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail
