"""Storage: tables, migrations and repository functions (SQLite or PostgreSQL)."""
