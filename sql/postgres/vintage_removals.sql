-- Audit trail of vintage removals: one row per removed vintage, with who
-- removed it (operating-system user and host), when (UTC) and how many rows
-- each table lost (JSON). Nothing else ever deletes from this table.
CREATE TABLE IF NOT EXISTS ${schema}.vintage_removals (
    removed_at      timestamp NOT NULL,
    removed_by      text NOT NULL,
    host            text,
    job             text NOT NULL,
    as_of           ${period_type} NOT NULL,
    run_id          text NOT NULL,
    attempts        integer,
    rows_removed    text,
    arflow_version  text
);
