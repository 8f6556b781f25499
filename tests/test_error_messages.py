"""Error messages are one safe, short line: control characters escaped, long values cut."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from arflow.cli import main
from arflow.errors import MAX_LINE, ArflowError, SourceError, clean_message
from arflow.sample.panels import default_job, job_toml, mixed_panel, write_table


def test_clean_message_escapes_controls_and_formatting() -> None:
    text = clean_message("key 'a\x1b[2J\x1b]0;title\x07b' \u202eevil\u202c \ud800 tab\there\nnext\r\x00")
    assert "\x1b" not in text and "\x07" not in text and "\u202e" not in text and "\x00" not in text
    assert "\\x1b[2J" in text and "\\u202e" in text and "\\ud800" in text and "\\x00" in text
    assert "\n" not in text and "\r" not in text and "tab here next" in text
    assert text.isprintable()


def test_clean_message_cuts_long_values_but_keeps_the_fix() -> None:
    long_name = "n" * 1_000_000
    text = clean_message(f"source has no column '{long_name}' (named as source.keys); rename it in the job file")
    assert len(text) < 300
    assert "characters cut" in text and text.endswith("(named as source.keys); rename it in the job file")
    # many ordinary words: the line is cut in the middle, keeping both ends
    text = clean_message("start " + "word " * 10_000 + "end of the fix")
    assert len(text) <= MAX_LINE + 50 and text.startswith("start word") and text.endswith("end of the fix")
    # ordinary messages are left alone
    assert clean_message("source has no column 'site'; columns available: a, b") == "source has no column 'site'; columns available: a, b"


def test_arflow_errors_are_clean_even_outside_the_cli() -> None:
    exc = SourceError("bad \x1b[31mred\x1b[0m " + "x" * 5000)
    assert "\x1b" not in str(exc) and len(str(exc)) < 300
    assert isinstance(exc, ArflowError) and exc.exit_code == 3


def _job(tmp_path: Path, key: str) -> Path:
    write_table(tmp_path / "warehouse.duckdb", mixed_panel())
    sections = default_job()
    sections["source"]["keys"] = [key]
    body = job_toml(sections)
    path = tmp_path / "job.toml"
    # TOML's \u escapes carry the raw control characters into the key name
    path.write_text(body.replace("\x1b", "\\u001b").replace("\x07", "\\u0007"), encoding="utf-8")
    return path


@pytest.mark.parametrize("log_format", ["text", "json"])
def test_ansi_escape_in_a_key_name_never_reaches_the_terminal(tmp_path: Path, capsys, log_format: str) -> None:
    code = main(["run", str(_job(tmp_path, "si\x1b[2J\x1b]0;pwned\x07te")), "--log-format", log_format])
    captured = capsys.readouterr()
    assert code in (2, 3)
    assert "\x1b" not in captured.err + captured.out and "\x07" not in captured.err + captured.out
    assert captured.err.startswith("arflow: error: ") and captured.err.count("\n") == 1
    assert "\\x1b" in captured.err
    if log_format == "json":
        event = json.loads(captured.out.strip().splitlines()[-1])
        assert event["event"] == "error" and "\x1b" not in event["message"]


def test_a_one_megabyte_name_gives_a_short_line(tmp_path: Path, capsys) -> None:
    code = main(["run", str(_job(tmp_path, "k" * 1_000_000))])
    err = capsys.readouterr().err
    assert code in (2, 3)
    assert err.startswith("arflow: error: ") and err.count("\n") == 1 and len(err) < 1_200


def test_usage_error_is_escaped(capsys) -> None:
    code = main(["run", "job.toml", "--no-such-\x1b[2J-option"])
    err = capsys.readouterr().err
    assert code == 2 and "\x1b" not in err and err.count("\n") == 1


def test_control_characters_in_source_column_names_are_escaped(tmp_path: Path, capsys) -> None:
    """The 'columns available' list comes from the source itself, not the job file."""
    frame = mixed_panel().rename({"site": "si\x1b[2Jte"})
    write_table(tmp_path / "warehouse.duckdb", frame)
    path = tmp_path / "job.toml"
    path.write_text(job_toml(default_job()), encoding="utf-8")
    code = main(["run", str(path)])
    err = capsys.readouterr().err
    assert code == 3 and err.count("\n") == 1
    assert "\x1b" not in err and "si\\x1b[2Jte" in err
