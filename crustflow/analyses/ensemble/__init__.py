"""crustflow.analyses.ensemble."""
