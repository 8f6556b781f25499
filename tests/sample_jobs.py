"""Job files over the small sample warehouse, shared by the run-call and orchestrator tests.

``ok`` is the shipped demo job (21 zones, 8 quarantined: 38%, under the 50%
alarm level); ``alarm`` lowers ``gates.max_quarantine_share`` to 10% so the
same run raises the quarantine alarm; ``broken`` has a misspelt key (a job-file
error, exit code 2); ``missing_table`` names a table the warehouse lacks (a
source error, exit code 3).
"""

from __future__ import annotations

from pathlib import Path

from arflow.sample import generate

#: the latest month of the sample warehouse (its default as-of)
LATEST = "2025-12-01"


def sample_jobs(directory: Path, workers: int = 1) -> dict[str, Path]:
    """Build the small sample warehouse in ``directory`` and write the job files; returns them by name."""
    directory.mkdir(parents=True, exist_ok=True)
    generate.build_sample_warehouse(directory / generate.DEMO_DATABASE, small=True)
    demo = generate.demo_job_text()
    assert "max_quarantine_share = 0.5" in demo and "chunk_series = 100" in demo
    if workers > 1:
        demo = demo.replace("chunk_series = 100", f"chunk_series = 5\nworkers = {workers}")
    texts = {
        "ok": demo,
        "alarm": demo.replace("max_quarantine_share = 0.5", "max_quarantine_share = 0.1"),
        "broken": demo.replace("max_quarantine_share = 0.5", "max_quarantine_shares = 0.5"),
        "missing_table": demo.replace('table = "water.monthly_demand"', 'table = "water.no_such_table"'),
    }
    paths = {}
    for name, text in texts.items():
        paths[name] = directory / f"{name}_job.toml"
        paths[name].write_text(text, encoding="utf-8")
    return paths
