-- The decision for every series in every run, with the run's failure policy
-- (so that the published_forecasts view is plain SQL), every reason code, every
-- gate row the series failed (gate, statistic, p_value, threshold) and the
-- warning checks that fired without holding it back. Names: arflow.vocabulary.
CREATE TABLE IF NOT EXISTS ${schema}.series_status (
    run_id      VARCHAR NOT NULL,
    job         VARCHAR NOT NULL,
    as_of       ${period_type} NOT NULL,
    ${key_defs},
    decision    VARCHAR NOT NULL,
    on_failure  VARCHAR NOT NULL,
    reasons     VARCHAR[],
    failed_gates STRUCT(gate VARCHAR, statistic DOUBLE, p_value DOUBLE, threshold DOUBLE)[],
    warnings    VARCHAR[]
);
