"""A corpus of bad inputs, each with the error it must give (see cases.py)."""
