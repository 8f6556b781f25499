-- One row per vintage run (run_id = "<job>@<as_of>"); a re-run of the same
-- vintage replaces its row and increments attempt. Times are UTC.
CREATE TABLE IF NOT EXISTS ${schema}.runs (
    run_id              VARCHAR NOT NULL,
    job                 VARCHAR NOT NULL,
    as_of               ${period_type} NOT NULL,
    attempt             INTEGER NOT NULL,
    started_at          TIMESTAMP NOT NULL,
    finished_at         TIMESTAMP NOT NULL,
    duration_seconds    DOUBLE,
    status              VARCHAR NOT NULL,
    series_total        BIGINT NOT NULL,
    series_published    BIGINT NOT NULL,
    series_quarantined  BIGINT NOT NULL,
    quarantine_share    DOUBLE,
    reason_counts       VARCHAR,
    on_failure          VARCHAR NOT NULL,
    frequency           VARCHAR,
    horizon             INTEGER,
    coverage            DOUBLE[],
    source              VARCHAR,
    config_sha256       VARCHAR NOT NULL,
    arflow_version      VARCHAR NOT NULL
);
