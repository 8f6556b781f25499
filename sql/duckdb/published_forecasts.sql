-- For every (job, series): the forecast rows of its latest vintage that holds
-- forecasts for it. "Latest" is by as_of, so a backfill never hides a newer
-- forecast.
-- If the series' latest vintage quarantined it, the older forecast stays
-- visible with stale = true when that run's policy was keep-previous (this
-- includes the forecast an earlier attempt of the same vintage published:
-- a re-run that quarantines a series keeps those rows), and the series is
-- left out when it was withdraw. A quarantined run's own numbers never appear
-- here (forecasts only holds published or kept rows).
-- Expiry: a stale forecast leaves the view once every one of its periods is
-- at or before the job's latest vintage, or once its vintage is more than
-- job_policy.stale_after_periods periods older than the latest vintage.
-- A run held back by [publish] hold_on_alarm writes no series_status or
-- forecasts rows, so it does not change this view.
CREATE OR REPLACE VIEW ${schema}.published_forecasts AS
WITH latest AS (
    SELECT job, ${key_list}, decision, on_failure
    FROM (
        SELECT s.*,
               row_number() OVER (PARTITION BY job, ${key_list} ORDER BY as_of DESC) AS recency
        FROM ${schema}.series_status AS s
    )
    WHERE recency = 1
),
with_forecasts AS (
    SELECT s.run_id, s.job, s.as_of, ${s_key_list}
    FROM ${schema}.series_status AS s
    WHERE s.decision = 'published'
    UNION ALL
    SELECT s.run_id, s.job, s.as_of, ${s_key_list}
    FROM ${schema}.series_status AS s
    SEMI JOIN (SELECT * FROM ${schema}.forecasts WHERE step = 1) AS k ON k.run_id = s.run_id AND ${ks_key_join}
    WHERE s.decision <> 'published' AND s.on_failure = 'keep-previous'
),
last_published AS (
    SELECT run_id, job, as_of, ${key_list}
    FROM (
        SELECT w.*,
               row_number() OVER (PARTITION BY job, ${key_list} ORDER BY as_of DESC) AS recency
        FROM with_forecasts AS w
    )
    WHERE recency = 1
),
job_latest AS (
    SELECT job, max(as_of) AS latest_as_of FROM ${schema}.series_status GROUP BY job
),
visible AS (
    SELECT p.run_id, p.job, p.as_of, ${p_key_list}, l.decision <> 'published' AS stale,
           j.latest_as_of AS arflow_latest__, pol.frequency AS arflow_frequency__,
           pol.stale_after_periods AS arflow_limit__
    FROM last_published AS p
    JOIN latest AS l ON p.job = l.job AND ${key_join}
    JOIN job_latest AS j ON j.job = p.job
    LEFT JOIN ${schema}.job_policy AS pol ON pol.job = p.job
    WHERE l.decision = 'published' OR l.on_failure = 'keep-previous'
),
live AS (
    -- stale forecasts that have not expired (the few rows the expiry rule needs to look at)
    SELECT v.run_id, ${v_key_list}
    FROM visible AS v
    JOIN ${schema}.forecasts AS f ON f.run_id = v.run_id AND ${f_key_join}
    WHERE v.stale AND (v.arflow_limit__ IS NULL OR ${age} <= v.arflow_limit__)
    GROUP BY v.run_id, ${v_key_list}, v.arflow_latest__
    HAVING max(f.period) > v.arflow_latest__
),
shown AS (
    SELECT run_id, job, as_of, stale, ${key_list} FROM visible WHERE NOT stale
    UNION ALL
    SELECT v.run_id, v.job, v.as_of, v.stale, ${v_key_list}
    FROM visible AS v SEMI JOIN live AS x ON x.run_id = v.run_id AND ${xv_key_join}
)
SELECT v.run_id, v.job, v.as_of, v.stale, f.* EXCLUDE (run_id)
FROM shown AS v
JOIN ${schema}.forecasts AS f ON f.run_id = v.run_id AND ${f_key_join};
