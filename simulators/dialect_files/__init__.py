"""Built-in instrument dialects of the served simulators (YAML), loaded by simulators.dialects."""
