-- Residual autocorrelation per run, series and lag.
CREATE TABLE IF NOT EXISTS ${schema}.residual_acf (
    run_id           VARCHAR NOT NULL,
    ${key_defs},
    lag              INTEGER NOT NULL,
    autocorrelation  DOUBLE,
    t_stat           DOUBLE,
    p_value          DOUBLE
);
