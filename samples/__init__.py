"""Invented, seeded demo data for boxwood (see ``samples/generate.py``)."""
