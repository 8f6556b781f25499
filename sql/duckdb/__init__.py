"""DuckDB dialect: the DDL and views of arflow's warehouse tables (templated by warehouse/duckdb_target.py)."""
