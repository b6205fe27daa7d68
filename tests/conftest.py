"""Fixtures shared by the tests; plain helpers live in tests/helpers/ (imported as ``helpers.*``)."""

from __future__ import annotations

import pytest

from helpers.runs import ShutterWatch


@pytest.fixture
def shutter_watch(monkeypatch) -> ShutterWatch:
    """Record every completed open/close of a simulated shutter and every SimulatedTable built."""
    from lightloom.simulators import devices
    from lightloom.simulators.table import SimulatedTable

    watch = ShutterWatch()
    opened, closed, built = devices.SimShutter.open, devices.SimShutter.close_beam, SimulatedTable.__init__

    def open_(self):
        opened(self)
        watch.commands.append("open")

    def close_(self):
        closed(self)
        watch.commands.append("close")

    def init(self, *args, **kwargs):
        built(self, *args, **kwargs)
        watch.tables.append(self)

    monkeypatch.setattr(devices.SimShutter, "open", open_)
    monkeypatch.setattr(devices.SimShutter, "close_beam", close_)
    monkeypatch.setattr(SimulatedTable, "__init__", init)
    return watch
