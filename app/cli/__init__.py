"""The ``morrow`` command line (stable for scripts: see DATA_CONTRACT.md)."""
