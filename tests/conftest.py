"""Shared fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture(scope="session")
def vintaged_demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The sample warehouse with two vintages of its job (2024-12 and the latest, 2025-12): the job file's path.

    The second run scores the first vintage's forecasts, so ``accuracy`` has rows.
    """
    from arflow.demo import prepare_demo
    from arflow.job import run_job
    from arflow.job_file import load_job

    job_path = prepare_demo(tmp_path_factory.mktemp("vintaged_demo"))
    spec = load_job(job_path)
    run_job(spec, as_of="2024-12")
    run_job(spec)
    return job_path
