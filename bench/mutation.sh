#!/usr/bin/env bash
# Mutation testing of the statistical core and the publish path (DEVELOPERS.md, "Mutation testing").
#
#   pip install -e '.[test,mutation]'
#   bash bench/mutation.sh                              # arflow/core/* and arflow/warehouse/duckdb_store.py
#   bash bench/mutation.sh 'arflow.core.gates.*'        # only some mutants (mutmut name globs)
#   bash bench/mutation.sh --survivors                  # list the survivors of the last run
#
# mutmut (configured in pyproject.toml, [tool.mutmut]) copies the package to mutants/, plants one
# small change at a time and runs the tests that reach the changed function; a mutant that no
# test notices "survives". Results are cached in mutants/ (delete it to start over). Not part of
# the pytest run: a full pass takes tens of minutes on two cores.
set -euo pipefail
cd "$(dirname "$0")/.."
if ! python -c "import mutmut" 2>/dev/null; then
    echo "mutation.sh: mutmut is not installed; run pip install -e '.[test,mutation]'" >&2
    exit 2
fi
if [ "${1:-}" = "--survivors" ]; then
    exec mutmut results
fi
if [ "$#" -eq 0 ]; then
    set -- 'arflow.core.*' 'arflow.warehouse.duckdb_store.*'
fi
mutmut run --max-children "${MUTATION_WORKERS:-2}" "$@"
mutmut results
