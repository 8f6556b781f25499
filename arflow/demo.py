"""``arflow demo``: the sample warehouse of the invented Vellmar zones, its job file, and one run of it."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from .job import EventSink, JobOutcome, run_job
from .job_file import load_job
from .sample import generate


def prepare_demo(directory: Path, seed: int | None = None) -> Path:
    """Build the sample warehouse and its job file in ``directory``; returns the job file.

    A job file already there that differs from the shipped one (the user
    edited it) is kept as it is; :func:`demo_job_note` says so.
    """
    directory.mkdir(parents=True, exist_ok=True)
    job_path = directory / generate.DEMO_JOB_FILE
    generate.build_sample_warehouse(directory / generate.DEMO_DATABASE, **({} if seed is None else {"seed": seed}))
    if demo_job_note(job_path) is None:
        job_path.write_text(generate.demo_job_text(), encoding="utf-8")
    return job_path


def demo_job_note(job_path: Path) -> str | None:
    """A note when ``job_path`` exists and is not the shipped demo job (so the demo must not overwrite it)."""
    try:
        text = job_path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError):
        text = None
    if text == generate.demo_job_text():
        return None
    return f"kept your edited job file {job_path} (not overwritten) and ran it; delete it to get the shipped demo job back"


def run_demo(directory: Path, on_event: EventSink | None = None) -> JobOutcome:
    """``arflow demo``: build the sample warehouse in ``directory`` and run its job (an edited job file is kept)."""
    note = demo_job_note(directory / generate.DEMO_JOB_FILE)
    if note is not None and on_event is not None:
        on_event({"event": "note", "message": note})
    job_path = prepare_demo(directory)
    outcome = run_job(load_job(job_path), on_event=on_event)
    if note is not None:
        outcome = replace(outcome, notes=(*outcome.notes, note))
    return outcome
