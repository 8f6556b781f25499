-- The decision for every series in every run, with the run's failure policy
-- (so that the published_forecasts view is plain SQL), every reason code, every
-- gate row the series failed and the warning checks that fired without holding
-- it back. Names: arflow.vocabulary. PostgreSQL dialect of
-- sql/duckdb/series_status.sql: reasons and warnings are text[]; failed_gates
-- (a list of STRUCT(gate, statistic, p_value, threshold) in DuckDB) is a jsonb
-- array of objects {"gate", "statistic", "p_value", "threshold"}, with null
-- where DuckDB holds NULL or a non-finite number (JSON has no NaN).
CREATE TABLE IF NOT EXISTS ${schema}.series_status (
    run_id      text NOT NULL,
    job         text NOT NULL,
    as_of       ${period_type} NOT NULL,
    ${key_defs},
    decision    text NOT NULL,
    on_failure  text NOT NULL,
    reasons     text[],
    failed_gates jsonb,
    warnings    text[]
);
