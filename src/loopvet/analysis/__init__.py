"""Loop analyses; every function takes the leading sample axis."""
