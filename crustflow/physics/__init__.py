"""crustflow.physics."""
