"""crustflow.geometry."""
