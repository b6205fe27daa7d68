"""The virtual optical bench: physics-backed simulated devices, in process and served on loopback; uses the optics model to decide what a detector sees."""
