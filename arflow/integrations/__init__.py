"""Steps for general-purpose orchestrators, each an optional extra and a module of its own.

``arflow.integrations.airflow`` (``pip install 'arflow-gated[airflow]'``) and
``arflow.integrations.dagster`` (``pip install 'arflow-gated[dagster]'``) run one
job through :func:`arflow.run_job_file` for the orchestrator's date;
``arflow.integrations.common`` holds what they share.
"""
