"""Plain data shared by every layer: vocabulary, the compiled step list, run records; imports numpy only."""
