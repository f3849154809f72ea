"""crustflow.engine."""
