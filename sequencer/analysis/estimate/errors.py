"""The typed error raised when readings or measurement operators cannot be turned into a state estimate."""

from __future__ import annotations

from lightloom.sequencer.errors import EXIT_BAD_INPUT, LightloomError


class EstimationError(LightloomError):
    """Operators or readings that no estimator can use (wrong shapes, non-physical operators, no signal).

    The message names what is wrong and what would fix it.
    """

    exit_status = EXIT_BAD_INPUT
