"""The loss vocabulary: the margin family f(beta * rho), pair objectives, one registry, one reduction."""
