#!/usr/bin/env bash
# One-stop entry for a fresh clone: creates .venv when missing, installs fcnkit into it, then
#   ./run.sh demo [args]   runs the demo (synthetic scenes -> training -> report -> tiled mapping)
#   ./run.sh test          runs ruff and the test suite
set -euo pipefail
cd "$(dirname "$0")"
VENV=.venv
STAMP="$VENV/.fcnkit-installed"
if [ ! -x "$VENV/bin/python" ]; then
    python3 -m venv "$VENV"
fi
if [ ! -f "$STAMP" ] || [ pyproject.toml -nt "$STAMP" ]; then
    "$VENV/bin/python" -m pip install --quiet --upgrade pip
    "$VENV/bin/python" -m pip install --quiet -e ".[test]"
    touch "$STAMP"
fi
cmd="${1:-}"
shift || true
case "$cmd" in
    demo) exec "$VENV/bin/python" -m fcnkit demo "$@" ;;
    test)
        "$VENV/bin/python" -m ruff check .  # the whole tree; .venv and git-ignored paths are skipped
        exec "$VENV/bin/python" -m pytest "$@" ;;
    *) echo "usage: ./run.sh demo|test [args]" >&2; exit 2 ;;
esac
