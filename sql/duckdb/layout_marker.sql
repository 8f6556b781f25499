-- Which tables of this schema arflow created (one row per table), so that a
-- later run never writes into a table arflow did not make (a user's own
-- "forecasts") and can name a table that was dropped by hand. columns lists the
-- table's columns as arflow created them (or later added them): a column missing
-- from the table but listed here was dropped by hand; one missing from both is
-- new in this arflow version and is added.
CREATE TABLE IF NOT EXISTS ${schema}.arflow_tables (
    table_name      VARCHAR NOT NULL,
    created_at      TIMESTAMP NOT NULL,
    created_by      VARCHAR NOT NULL,
    arflow_version  VARCHAR NOT NULL,
    key_columns     VARCHAR[] NOT NULL,
    period_type     VARCHAR NOT NULL,
    columns         VARCHAR[] NOT NULL
);
