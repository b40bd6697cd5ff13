"""Checkpoints of a run: atomic checksummed files, plain and sharded (fsdp), resume and verification."""
