-- The latest status of every series of every job, in one query: the
-- series_status row of its latest vintage (by as_of) with the decision, every
-- reason, each failed gate's statistic, p-value and threshold, and the warnings.
-- A run held back by [publish] hold_on_alarm writes no series_status rows, so
-- it does not change this view (its gates are in the gates table).
CREATE OR REPLACE VIEW ${schema}.latest_series_status AS
SELECT run_id, job, as_of, ${key_list}, decision, reasons, failed_gates, warnings, on_failure
FROM (
    SELECT s.*,
           row_number() OVER (PARTITION BY job, ${key_list} ORDER BY as_of DESC) AS recency
    FROM ${schema}.series_status AS s
)
WHERE recency = 1;
