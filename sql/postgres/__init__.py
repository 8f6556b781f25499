"""PostgreSQL dialect: the DDL and views of arflow's warehouse tables (templated by warehouse/postgres_target.py)."""
