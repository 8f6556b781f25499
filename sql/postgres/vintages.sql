-- One row per (job, as_of): the run that holds that vintage.
CREATE TABLE IF NOT EXISTS ${schema}.vintages (
    job           text NOT NULL,
    as_of         ${period_type} NOT NULL,
    run_id        text NOT NULL,
    attempt       integer NOT NULL,
    published_at  timestamp NOT NULL
);
