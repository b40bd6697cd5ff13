"""The one training loop and what it needs: optimiser, stopping, batching, step loss, run folder, verdict, sft."""
