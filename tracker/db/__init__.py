"""Data layer: SQLAlchemy models, engine and sessions, migrations glue."""
