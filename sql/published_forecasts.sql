-- For every (job, series): the forecast rows of its latest published vintage.
-- "Latest" is by as_of, so a backfill never hides a newer forecast.
-- If the series' latest vintage quarantined it, the older forecast stays
-- visible with stale = true when that run's policy was keep-previous, and the
-- series is left out when it was withdraw. A quarantined run's own numbers
-- never appear here (forecasts only holds published series).
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
last_published AS (
    SELECT run_id, job, as_of, ${key_list}
    FROM (
        SELECT s.*,
               row_number() OVER (PARTITION BY job, ${key_list} ORDER BY as_of DESC) AS recency
        FROM ${schema}.series_status AS s
        WHERE decision = 'published'
    )
    WHERE recency = 1
),
visible AS (
    SELECT p.run_id, p.job, p.as_of, ${p_key_list}, l.decision <> 'published' AS stale
    FROM last_published AS p
    JOIN latest AS l ON p.job = l.job AND ${key_join}
    WHERE l.decision = 'published' OR l.on_failure = 'keep-previous'
)
SELECT v.run_id, v.job, v.as_of, v.stale, f.* EXCLUDE (run_id)
FROM visible AS v
JOIN ${schema}.forecasts AS f ON f.run_id = v.run_id AND ${f_key_join};
