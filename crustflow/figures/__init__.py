"""crustflow.figures."""
