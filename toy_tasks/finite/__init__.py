"""Finite tasks: responses, reference, sampling and preferences; the task file; a task prepared for a run."""
