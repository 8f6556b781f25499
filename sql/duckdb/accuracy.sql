-- How published forecasts fared once their actuals arrived: one row per
-- forecast vintage (forecast_run_id), series and forecast period, written once
-- by the first run that sees the actual (recorded_by). (Before this release
-- forecast_run_id was called run_id, which everywhere else names the run that
-- wrote the row; the first run of this release renames it in place.) covered_NN columns (added with ALTER TABLE)
-- say whether the NN% interval held the actual.
CREATE TABLE IF NOT EXISTS ${schema}.accuracy (
    forecast_run_id VARCHAR NOT NULL,
    job             VARCHAR NOT NULL,
    ${key_defs},
    period          ${period_type} NOT NULL,
    step            INTEGER NOT NULL,
    forecast        DOUBLE,
    actual          DOUBLE,
    error           DOUBLE,
    abs_pct_error   DOUBLE,
    recorded_by     VARCHAR NOT NULL
);
