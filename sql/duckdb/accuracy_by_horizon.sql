-- Accuracy of published vintages by job and forecast step, for dashboards.
-- error = actual - forecast; mape skips actuals of zero; hit_rate_NN is the
-- share of actuals inside the NN% interval.
CREATE OR REPLACE VIEW ${schema}.accuracy_by_horizon AS
SELECT job,
       step,
       count(*)                      AS forecasts_scored,
       count(DISTINCT forecast_run_id) AS vintages,
       avg(error)                    AS mean_error,
       avg(abs(error))               AS mae,
       sqrt(avg(error * error))      AS rmse,
       avg(abs_pct_error)            AS mape${hit_rates}
FROM ${schema}.accuracy
GROUP BY job, step;
