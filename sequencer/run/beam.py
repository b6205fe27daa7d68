"""The one rule for watching the beam: what measures the source power, reading by reading.

A pick-off reference meter measures it directly. Without one, the detector ports measure it only
when they form a complete set (every combination of the splitter and sorter outputs they use):
then the gain-corrected sum of a setting's ports is the total power whatever the state. Otherwise
a dark projector cannot be told from a lost beam, and nothing watches it. The runner, the session
(warning and the baseline on resume) all use these functions.
"""

from __future__ import annotations

import math

import numpy as np

from lightloom.sequencer.model.records import ReadingTable
from lightloom.sequencer.optics.analyzer import complete_port_set
from lightloom.sequencer.plan.compiler import TableModel


def ports_watch_the_beam(table: TableModel) -> bool:
    """True when the detector ports' gain-corrected sum is the source power (a complete set)."""
    return complete_port_set([(p.sorter_port, p.splitter_port) for p in table.ports])


def beam_level(kind: str, values: np.ndarray, reference_w: float, table: TableModel) -> float | None:
    """The beam monitor's level for one reading (W or counts), or None when nothing measures it.

    Background readings (shutter closed) never give a level from the ports.
    """
    if not math.isnan(reference_w):
        return float(reference_w)
    if kind != "background" and ports_watch_the_beam(table):
        gains = np.array([p.gain for p in table.ports])
        return float(np.sum(np.asarray(values) / gains))
    return None


def initial_beam_level(readings: ReadingTable, table: TableModel) -> float | None:
    """The baseline a run started from: the level of its first reading that is not a background."""
    usable = np.flatnonzero(~readings.of_kind("background"))
    if usable.size == 0:
        return None
    i = int(usable[0])
    return beam_level(str(readings.kind[i]), readings.values[i], float(readings.reference_w[i]), table)
