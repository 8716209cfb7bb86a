"""thermeta's store: the schema and every query (SQLAlchemy 2.x; SQLite by default, PostgreSQL
too)."""
