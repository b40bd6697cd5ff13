"""What `polopt check` runs: the margin and pair checks, the population check, their results and plot."""
