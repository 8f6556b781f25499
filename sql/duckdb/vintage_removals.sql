-- Audit trail of `arflow retract`: one row per removed vintage, with who
-- removed it (operating-system user and host), when (UTC) and how many rows
-- each table lost (JSON). Nothing else ever deletes from this table.
CREATE TABLE IF NOT EXISTS ${schema}.vintage_removals (
    removed_at      TIMESTAMP NOT NULL,
    removed_by      VARCHAR NOT NULL,
    host            VARCHAR,
    job             VARCHAR NOT NULL,
    as_of           ${period_type} NOT NULL,
    run_id          VARCHAR NOT NULL,
    attempts        INTEGER,
    rows_removed    VARCHAR,
    arflow_version  VARCHAR
);
