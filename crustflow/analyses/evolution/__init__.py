"""Analyses through time: evolution of topography and crust, steady states."""
