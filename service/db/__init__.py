"""Persistence: typed tables, engine and sessions, migrations and queries."""
