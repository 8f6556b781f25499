-- Rolling-origin backtest accuracy per run, series, method and step.
-- model: 'ar' (the series' own AR specification), 'naive' (last value),
-- 'seasonal_naive' (same season last year). step: steps ahead (1..backtest
-- horizon). hit_rate_NN (AR rows only) is the share of origins whose actual
-- fell inside the NN% interval; columns are added (ALTER TABLE) the first time
-- a job asks for level NN. (Before this release: horizon and coverage_NN,
-- renamed in place by the first run of this release.)
CREATE TABLE IF NOT EXISTS ${schema}.backtests (
    run_id   VARCHAR NOT NULL,
    ${key_defs},
    model    VARCHAR NOT NULL,
    step     INTEGER NOT NULL,
    rmse     DOUBLE,
    mae      DOUBLE,
    mase     DOUBLE,
    origins  INTEGER
);
