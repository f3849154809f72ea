"""crustflow.io."""
