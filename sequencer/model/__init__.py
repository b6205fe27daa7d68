"""Plain data shared by every layer: vocabulary, value checks, the compiled step list, run records; imports numpy only."""
