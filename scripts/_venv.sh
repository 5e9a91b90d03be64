# Sourced by scripts/demo and scripts/test: make .venv (if missing) and install shardrank into it.
# usage: ensure_venv EXTRAS   (e.g. "" or "[test]")
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
ensure_venv() {
  local extras="$1"
  local py="${PYTHON:-python3}"
  if ! "$py" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else 1)' 2>/dev/null; then
    echo "error: shardrank needs Python 3.11 or newer ($py is $("$py" --version 2>&1))" >&2
    echo "hint:  set PYTHON=/path/to/python3.11" >&2
    exit 2
  fi
  if [ ! -x "$ROOT/.venv/bin/python" ]; then
    echo "creating $ROOT/.venv ..." >&2
    "$py" -m venv "$ROOT/.venv"
  fi
  local stamp="$ROOT/.venv/.shardrank-installed$extras"
  if [ ! -f "$stamp" ] || [ "$ROOT/pyproject.toml" -nt "$stamp" ]; then
    echo "installing shardrank$extras into .venv (first run only) ..." >&2
    # (some machines' pip config names local indexes that may be absent: hide only those warnings)
    "$ROOT/.venv/bin/python" -m pip install --quiet --upgrade pip 2>&1 | { grep -v '^WARNING: Location' || true; } >&2
    "$ROOT/.venv/bin/python" -m pip install --quiet -e "$ROOT$extras" 2>&1 | { grep -v '^WARNING: Location' || true; } >&2
    touch "$stamp"
  fi
}
