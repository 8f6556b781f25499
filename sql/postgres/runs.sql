-- One row per vintage run (run_id = "<job>@<as_of>"); a re-run of the same
-- vintage replaces its row and increments attempt. Times are UTC.
-- (PostgreSQL dialect of sql/runs.sql: the same columns.)
CREATE TABLE IF NOT EXISTS ${schema}.runs (
    run_id              text NOT NULL,
    job                 text NOT NULL,
    as_of               ${period_type} NOT NULL,
    attempt             integer NOT NULL,
    started_at          timestamp NOT NULL,
    finished_at         timestamp NOT NULL,
    duration_seconds    double precision,
    status              text NOT NULL,
    series_total        bigint NOT NULL,
    series_published    bigint NOT NULL,
    series_quarantined  bigint NOT NULL,
    quarantine_share    double precision,
    reason_counts       text,
    on_failure          text NOT NULL,
    frequency           text,
    horizon             integer,
    coverage            double precision[],
    source              text,
    config_sha256       text NOT NULL,
    arflow_version      text NOT NULL
);
