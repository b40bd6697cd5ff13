"""Policies and what scores them: tabular, tiny transformer, local causal LMs, log-probs, reference cache, sampling."""
