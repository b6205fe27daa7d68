"""lightloom: measurement sequencer and reconstruction for structured-light tomography."""

__version__ = "0.1.0"
