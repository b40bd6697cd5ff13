"""task=pairs: a preference-pair file trained with a sequence policy, in memory or streamed from disk."""
