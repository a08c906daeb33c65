"""Searches over a space: the one loop, the density search, baselines and fixed lists."""
