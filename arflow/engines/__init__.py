"""Where the statistical core runs: in this process or worker processes (``local``), or in Spark tasks (``spark``)."""
