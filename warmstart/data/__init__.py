"""Data files in: reading tables (read.py), the columns a profile or model sees (features.py), and
the rows, labels and values it sees, each change counted in a note (clean.py)."""
