"""Presentation of analysis results: terminal tables (rich) and figures (matplotlib); reads and writes no run files."""
