"""Persistence: the only room that talks to the database (SQLAlchemy Core)."""
