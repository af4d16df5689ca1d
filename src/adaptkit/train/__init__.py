"""The training loop, its schedules, the run folder and checkpoints."""
