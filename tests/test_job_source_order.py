"""The physical order of the source rows never changes a run's results."""

from __future__ import annotations

from pathlib import Path

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table


def test_shuffled_source_gives_the_same_published_rows(tmp_path: Path, capsys) -> None:
    frame = mixed_panel()
    results = []
    for name, rows in (("sorted", frame), ("shuffled", frame.sample(fraction=1.0, shuffle=True, seed=3))):
        folder = tmp_path / name
        folder.mkdir()
        write_table(folder / "warehouse.duckdb", rows)
        sections = default_job("warehouse.duckdb")
        sections["run"] = {"chunk_series": 4}
        (folder / "job.toml").write_text(job_toml(sections), encoding="utf-8")
        assert main(["run", str(folder / "job.toml")]) == 0
        capsys.readouterr()
        state = warehouse_state(folder / "warehouse.duckdb")
        results.append({t: state[t] for t in ("published_forecasts", "models", "gates", "residual_acf")})
    assert results[0] == results[1]
