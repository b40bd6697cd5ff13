"""Exact optima: closed forms, the hinge LP, Newton in the logits for any pair objective, certificates."""
