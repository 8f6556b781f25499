-- One row per (job, as_of): the run that holds that vintage.
CREATE TABLE IF NOT EXISTS ${schema}.vintages (
    job           VARCHAR NOT NULL,
    as_of         ${period_type} NOT NULL,
    run_id        VARCHAR NOT NULL,
    attempt       INTEGER NOT NULL,
    published_at  TIMESTAMP NOT NULL
);
