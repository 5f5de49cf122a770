"""Imports: validate every row of a CSV file, then write all of it or nothing."""

from app.ingest.importer import KINDS, ImportRefused, ImportResult, Problem, import_file

__all__ = ["KINDS", "ImportRefused", "ImportResult", "Problem", "import_file"]
