-- Forecasts of the series a run published. lower_NN / upper_NN columns are
-- added (ALTER TABLE) the first time a job asks for coverage level NN.
CREATE TABLE IF NOT EXISTS ${schema}.forecasts (
    run_id    VARCHAR NOT NULL,
    ${key_defs},
    period    ${period_type} NOT NULL,
    step      INTEGER NOT NULL,
    forecast  DOUBLE
);
