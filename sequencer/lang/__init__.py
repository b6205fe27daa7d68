"""The languages users write: safe YAML reading, field checks, protocol and bench files, built-ins; imports optics, model and errors only."""
