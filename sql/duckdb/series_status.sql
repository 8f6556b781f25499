-- The decision for every series in every run, with the run's failure policy,
-- so that the published_forecasts view is plain SQL.
CREATE TABLE IF NOT EXISTS ${schema}.series_status (
    run_id      VARCHAR NOT NULL,
    job         VARCHAR NOT NULL,
    as_of       ${period_type} NOT NULL,
    ${key_defs},
    decision    VARCHAR NOT NULL,
    on_failure  VARCHAR NOT NULL
);
