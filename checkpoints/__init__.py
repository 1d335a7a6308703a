"""The shipped default model (installed from checkpoints/ at the top of the repository)."""
