"""Data files in: reading tables, and the columns a profile or model sees."""
