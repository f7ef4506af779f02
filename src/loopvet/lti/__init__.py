"""Linear time-invariant building blocks: batched polynomials, rationals, loop assembly."""
