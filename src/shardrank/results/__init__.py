"""Scores by key, top-k, export and run comparison."""
