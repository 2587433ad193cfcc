# Sourced by scripts/demo and scripts/test: make .venv (Python >= 3.11) and install the project into it.
# Re-installs only when pyproject.toml changed since the last install.
set -euo pipefail
root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$root"
extras="${1:-}"
python_bin="${PYTHON:-python3}"
if ! "$python_bin" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else 1)' 2>/dev/null; then
  echo "equitheta needs Python 3.11 or newer (set PYTHON=/path/to/python3.11)" >&2
  exit 2
fi
if [ ! -x .venv/bin/python ]; then
  "$python_bin" -m venv .venv
fi
stamp=".venv/.installed${extras:+-$extras}"
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
  echo "setting up .venv (first run only; log in .venv/install.log) ..." >&2
  if ! { .venv/bin/python -m pip install --upgrade pip \
         && .venv/bin/python -m pip install -e ".${extras:+[$extras]}"; } >.venv/install.log 2>&1; then
    tail -n 30 .venv/install.log >&2
    echo "installation failed; full log in .venv/install.log" >&2
    exit 2
  fi
  touch "$stamp"
fi
