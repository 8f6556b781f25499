-- One row per run, series and gate: the statistic, its p-value and the verdict.
CREATE TABLE IF NOT EXISTS ${schema}.gates (
    run_id     VARCHAR NOT NULL,
    ${key_defs},
    gate       VARCHAR NOT NULL,
    statistic  DOUBLE,
    p_value    DOUBLE,
    threshold  DOUBLE,
    passed     BOOLEAN
);
