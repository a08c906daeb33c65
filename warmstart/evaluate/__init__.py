"""Evaluating configs: metrics, objectives, built-in learners, time limits, workers."""
