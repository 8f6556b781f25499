-- Rolling-origin backtest accuracy per run, series, method and step.
-- model: 'ar' (the series' own AR specification), 'naive' (last value),
-- 'seasonal_naive' (same season last year). coverage_NN (AR rows only) is the
-- share of origins whose actual fell inside the NN% interval; columns are
-- added (ALTER TABLE) the first time a job asks for level NN.
CREATE TABLE IF NOT EXISTS ${schema}.backtests (
    run_id   VARCHAR NOT NULL,
    ${key_defs},
    model    VARCHAR NOT NULL,
    horizon  INTEGER NOT NULL,
    rmse     DOUBLE,
    mae      DOUBLE,
    mase     DOUBLE,
    origins  INTEGER
);
