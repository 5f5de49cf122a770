"""Invented demo hospital: a seeded generator of CSVs in the data contract's formats."""
