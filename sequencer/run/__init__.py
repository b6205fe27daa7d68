"""The run shell: runner, session, beam watch, live display, safety caution; the one layer that puts devices, storage and time together."""
