-- Which tables of this schema arflow created (one row per table), so that a
-- later run never writes into a table arflow did not make and can name a
-- table that was dropped by hand. columns lists the table's columns as arflow
-- created them (or later added them).
CREATE TABLE IF NOT EXISTS ${schema}.arflow_tables (
    table_name      text NOT NULL,
    created_at      timestamp NOT NULL,
    created_by      text NOT NULL,
    arflow_version  text NOT NULL,
    key_columns     text[] NOT NULL,
    period_type     text NOT NULL,
    columns         text[] NOT NULL
);
