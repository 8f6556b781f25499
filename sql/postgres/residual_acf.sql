-- Residual autocorrelation per run, series and lag.
CREATE TABLE IF NOT EXISTS ${schema}.residual_acf (
    run_id           text NOT NULL,
    ${key_defs},
    lag              integer NOT NULL,
    autocorrelation  double precision,
    t_stat           double precision,
    p_value          double precision
);
