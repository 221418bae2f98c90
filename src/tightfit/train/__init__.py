"""Training: the sandwich rule, the loop, torchrun, checkpoints, the run folder, baselines."""
