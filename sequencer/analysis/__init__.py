"""Analysis (pure): preparation of readings, estimation, figures of merit, calibration fits; imports optics, model and errors only, no files, no terminal."""
