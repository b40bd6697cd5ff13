"""Exact targets of the methods beyond offline losses: Nash equilibria, best-of-n, reward fits."""
