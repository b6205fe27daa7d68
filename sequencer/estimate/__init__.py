"""State estimation: linear inversion, maximum likelihood, figures of merit and bootstrap uncertainties (pure numpy)."""
