"""Storage: SQLAlchemy models, engine/session set-up, migrations and the queue operations."""
