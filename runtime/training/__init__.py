"""The training core: the step, the run loop and what it needs (optimizer, checkpoints glue, health, verify)."""
