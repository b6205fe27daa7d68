"""Run storage: the append-only journal (record of truth) and the HDF5 run file derived from it."""
