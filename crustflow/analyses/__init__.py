"""crustflow.analyses."""
