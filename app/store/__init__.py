"""Storage: SQLAlchemy 2 models, the engine and session, and repositories."""
