"""Imports: validate every row of a CSV file, then write all of it or nothing."""

from app.ingest.importer import KINDS, ImportResult, import_file
from app.ingest.parse import ImportRefused, Problem

__all__ = ["KINDS", "ImportRefused", "ImportResult", "Problem", "import_file"]
