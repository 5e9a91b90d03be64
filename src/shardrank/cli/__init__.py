"""The command line: the argument parser and one error handler; nothing else."""
