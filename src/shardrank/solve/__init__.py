"""The iteration: options, teleport and warm start, engines, the driver, checkpoints, runs."""
