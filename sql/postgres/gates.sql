-- One row per run, series and gate: the statistic, its p-value and the verdict.
CREATE TABLE IF NOT EXISTS ${schema}.gates (
    run_id     text NOT NULL,
    ${key_defs},
    gate       text NOT NULL,
    statistic  double precision,
    p_value    double precision,
    threshold  double precision,
    passed     boolean
);
