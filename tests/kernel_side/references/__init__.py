"""Plain reference implementations the tests compare jostle against (not shipped)."""
