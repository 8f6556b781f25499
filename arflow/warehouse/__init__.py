"""Warehouse edges: read a source through DuckDB, publish a run atomically."""
