"""The walk-through of `polopt demo`: an invented scenario, its pipeline, win-rates and a biased judge."""
