"""Fitting the channel to observations: posterior of scalar parameters from observed rates."""
