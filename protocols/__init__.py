"""Built-in measurement protocols (YAML), usable by name after install."""
