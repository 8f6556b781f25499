"""Mutation testing of the statistical core and the publish path, one target at a time.

    pip install -e '.[test,mutation]'
    python tools/mutation.py gates              # or diagnostics, forecast, core, publish
    python tools/mutation.py gates --survivors  # list the survivors of the last run of a target
    python tools/mutation.py gates --show NAME  # the diff of one mutant
    python tools/mutation.py gates NAME...      # re-run only these mutants (names or globs)

mutmut plants one small change (a "mutant") at a time in a copy of the package and
runs the tests that reach the changed function; a mutant no test notices survives.
Each target mutates only its modules and runs only its own tests (the targeted
selection below), in its own work folder ``.mutation/<target>/`` (git-ignored), whose
``pyproject.toml`` is this project's with ``[tool.mutmut]`` narrowed to the target.
Results are cached there; delete the folder to start over. Not part of the pytest
run: gates, diagnostics and forecast take a few minutes each on two cores, ``core``
and ``publish`` much longer. See DEVELOPERS.md, "Mutation testing".
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

#: target -> (modules to mutate, tests that judge them)
TARGETS: dict[str, tuple[list[str], list[str]]] = {
    "gates": (["arflow/core/gates.py"], ["tests/test_gates.py"]),
    "diagnostics": (["arflow/core/diagnostics.py"], ["tests/test_diagnostics.py"]),
    "forecast": (
        ["arflow/core/forecast.py"],
        ["tests/test_core_forecast.py", "tests/test_published_reference.py"],
    ),
    "core": (
        ["arflow/core/*"],
        [
            "tests/test_gates.py", "tests/test_diagnostics.py", "tests/test_core_forecast.py",
            "tests/test_core_fit.py", "tests/test_core_panel.py", "tests/test_unitroot.py",
            "tests/test_distributions.py", "tests/test_backtest.py", "tests/test_api.py",
            "tests/test_published_reference.py",
        ],
    ),
    "publish": (
        ["arflow/warehouse/duckdb_target.py"],
        [
            "tests/test_published_reference.py", "tests/test_accuracy_tracking.py",
            "tests/test_job_atomicity.py", "tests/test_cli_run.py",
        ],
    ),
}


def _toml_list(items: list[str]) -> str:
    return "[" + ", ".join(f'"{i}"' for i in items) + "]"


def work_folder(target: str) -> Path:
    """``.mutation/<target>/`` with links to the package and tests and a narrowed pyproject.toml."""
    modules, tests = TARGETS[target]
    work = ROOT / ".mutation" / target
    work.mkdir(parents=True, exist_ok=True)
    for name in ("arflow", "tests"):
        link = work / name
        if not link.exists():
            link.symlink_to(ROOT / name, target_is_directory=True)
    text = (ROOT / "pyproject.toml").read_text(encoding="utf-8")
    # drop the project's own [tool.mutmut] table and put the target's in its place
    text = re.sub(r"(?ms)^\[tool\.mutmut\]\n.*?(?=^\[|\Z)", "", text).rstrip() + "\n"
    text += (
        "\n[tool.mutmut]\n"
        'source_paths = ["arflow/"]\n'
        f"only_mutate = {_toml_list(modules)}\n"
        'also_copy = ["arflow/sql/", "arflow/sample/"]\n'
        'pytest_add_cli_args = ["-m", "not spark and not slow", "-p", "no:cacheprovider"]\n'
        # a survivor runs every test that reaches it; on a busy shared machine the default wall-clock
        # limit (15x the tests' measured time) reported equivalent mutants as timeouts
        "timeout_multiplier = 60.0\n"
        # workers forked from a process whose tests already ran polars/DuckDB (thread pools) can
        # hang; a fork server that has only imported the tests is safe
        'process_isolation = "forkserver"\n'
        f"pytest_add_cli_args_test_selection = {_toml_list(tests)}\n"
    )
    config = work / "pyproject.toml"
    if not config.exists() or config.read_text(encoding="utf-8") != text:
        config.write_text(text, encoding="utf-8")
    return work


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Mutation testing of one target (see DEVELOPERS.md).")
    ap.add_argument("target", choices=sorted(TARGETS))
    ap.add_argument("mutants", nargs="*", help="only these mutants (names or globs from --survivors)")
    ap.add_argument("--workers", type=int, default=2, help="mutants tested at once (default 2)")
    ap.add_argument("--survivors", action="store_true", help="list the survivors of the last run")
    ap.add_argument("--show", metavar="MUTANT", help="print the diff of one mutant")
    args = ap.parse_intermixed_args(argv)
    try:
        import mutmut  # noqa: F401
    except ImportError:
        print("mutation.py: mutmut is not installed; run pip install -e '.[test,mutation]'", file=sys.stderr)
        return 2
    work = work_folder(args.target)
    mutmut = [sys.executable, "-m", "mutmut"]
    env = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1"}
    if args.show:
        return subprocess.call([*mutmut, "show", args.show], cwd=work, env=env)
    if not args.survivors:
        code = subprocess.call([*mutmut, "run", "--max-children", str(args.workers), *args.mutants], cwd=work, env=env)
        if code:
            return code
    return subprocess.call([*mutmut, "results"], cwd=work, env=env)


if __name__ == "__main__":
    sys.exit(main())
