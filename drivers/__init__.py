"""Device interfaces, typed instrument errors, and the VISA and serial driver families; knows nothing of protocols (imports only the shared vocabulary from lightloom.sequencer.model)."""
