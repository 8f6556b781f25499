-- One row per job: what the published_forecasts view needs to expire kept
-- (stale) forecasts: the job's frequency and [publish] stale_after_periods
-- (NULL: kept forecasts stay until all their periods are past). Written by
-- each run that changes the view.
CREATE TABLE IF NOT EXISTS ${schema}.job_policy (
    job                  VARCHAR NOT NULL,
    frequency            VARCHAR NOT NULL,
    stale_after_periods  INTEGER
);
