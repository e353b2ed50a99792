#!/usr/bin/env bash
# One entry point for a fresh clone:  ./dev.sh demo  |  ./dev.sh test [pytest args]  |  ./dev.sh bench
# Each command sets itself up: a virtual environment in .venv with fieldmix installed in it,
# and (for tests, when run as root with apt) the system packages the tests need.
set -euo pipefail
cd "$(dirname "$0")"
ROOT=$(pwd)
VENV="$ROOT/.venv"
PY="${PYTHON:-python3}"

setup_venv() {
  local extras="$1"
  if [ ! -x "$VENV/bin/python" ]; then
    echo "dev.sh: creating virtual environment in .venv" >&2
    "$PY" -m venv "$VENV"
  fi
  local stamp="$VENV/.installed-$extras"
  if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
    echo "dev.sh: installing fieldmix[$extras] into .venv" >&2
    "$VENV/bin/python" -m pip install -q --disable-pip-version-check -e ".[$extras]" 2>&1 \
      | grep -v -e "is ignored: it is neither a file nor a directory" -e "Running pip as the 'root' user" >&2 || true
    "$VENV/bin/python" -c "import fieldmix" || { echo "dev.sh: install failed" >&2; exit 1; }
    touch "$stamp"
  fi
}

case "${1:-}" in
  demo)
    shift
    setup_venv plot
    exec "$VENV/bin/fieldmix" demo "$@"
    ;;
  test)
    shift
    bash tools/install-system-deps.sh
    setup_venv test
    exec "$VENV/bin/python" -m pytest "$@"
    ;;
  bench)
    shift
    bash tools/install-system-deps.sh
    setup_venv test
    for b in benchmarks/*.py; do echo "== $b"; "$VENV/bin/python" "$b" "$@"; done
    ;;
  *)
    echo "usage: ./dev.sh demo | test [pytest args] | bench" >&2
    exit 2
    ;;
esac
