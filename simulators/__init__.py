"""The virtual optical bench: physics-backed simulated devices, in process and served on loopback."""
