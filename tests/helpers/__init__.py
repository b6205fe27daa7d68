"""Helpers shared by the tests (run helpers, storage records, a fake instrument server, old run files)."""
