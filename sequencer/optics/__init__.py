"""Pure optics model: Jones matrices, the joint polarization (x) spatial-mode space, Stokes parameters, port operators and analyzer settings; imports numpy, scipy and model only."""
