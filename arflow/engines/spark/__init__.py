"""The Spark engine: the core runs in Spark tasks on hash buckets of whole series.

By concern: ``session`` (pyspark and the SparkSession), ``bucketing`` (how
series fall into buckets = tasks), ``tasks`` (what a task computes and how its
results come back to the driver), ``source`` (a Spark table or Parquet path as
a job's source), ``engine`` (the job's engine) and ``frame`` (``arflow.forecast``
on a Spark DataFrame). These are the only modules that import pyspark, and
only inside functions, so arflow works without the ``spark`` extra until a job
or a call asks for Spark.

Why the numbers equal the local engine's: order selection, unit-root tests,
diagnostics, forecasts and gates are all per series, so which other series
share a bucket does not change a series' results. The one gate that looks
across series, ``gates.series_fdr``, is refused with Spark (see
:func:`arflow.settings.refuse_series_fdr_on_spark`).
"""
