"""Device interfaces, typed instrument errors, and the VISA and serial driver families."""
