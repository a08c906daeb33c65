"""Measuring transfer in bits: targets and intervals, replay and live protocols, reports."""
