"""What intervals and gates do and do not guarantee: the README section of the same name, for the report.

Kept word for word with the README ("What the gates guarantee and what they
do not"); ``tests/test_report.py`` holds the two together.
"""

CAUTIONS: tuple[str, ...] = (
    "Forecasts are statistical estimates from a linear AR model of each series' own past. They know nothing about events, prices, policy or anything outside the series.",
    'Prediction intervals assume the chosen model (its lags, its transform) is the right model, with normal, constant-variance errors. By default they do include the uncertainty of the estimated coefficients (delta method, see "Statistical method"), which brings coverage to within about 2 points of the stated level when the model is right, from 40 points on. They do not cover the error of choosing the wrong order or transform, nor the small-sample bias of the AR coefficients: for persistent series of 40-60 points (AR(2) with coefficients 0.5 and 0.3, AR(1) with 0.9, random walks the unit-root rule keeps on levels) 12-step intervals still cover several points less than stated (table below). The `interval_undercoverage` gate checks coverage out of sample.',
    'Outlier detection flags about 1% of clean Gaussian series (measured 0.2-0.9%); with `outliers = "treat"` those series get an intervention term they do not need, which costs a little precision but is reported in `outlier_periods`.',
    'A passed gate means only that the test found no evidence against the model at the stated level. It is not proof that the model is right. With few observations the tests have little power.',
    'Measured false-rejection rates (see "Measured rates" above) hold for data that follow the model; the rates on real data depend on how far the data are from it.',
    'Levels or differences is a decision under uncertainty. Random walks of 60+ points are differenced in 91-94% of cases; the rest are modelled on levels. Short series lean to levels: about 11% of 40-point random walks stay on levels (their persistence estimate falls below `unit_root_min_persistence`), the price of not differencing stationary short series (about 6% of 24-point AR(1) series with phi 0.5 are still differenced). See "Measured rates".',
    'The backtest scores the specification chosen on all the data, so it slightly flatters the model; the `worse_than_naive` ratio is noisy with few origins.',
    'Each test runs per series at level `alpha`. So some good series fail by chance (about `alpha` of them per test, unless `series_fdr` is set), and are held back even though nothing is wrong with them. A quarantine is a prompt to look, not a verdict.',
    "For decisions about money, operations or safety, treat the published forecasts as one input to your organisation's own review, not as the decision.",
)
