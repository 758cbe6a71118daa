#!/usr/bin/env bash
# Create or refresh the Python virtual environment of klgauge's scripts.
#
#   bash scripts/setup_python.sh            # venv at <repo>/.venv
#   KLGAUGE_VENV=/some/dir bash scripts/setup_python.sh
#
# Needs only python3 (3.10+) with the venv module and pip, and a reachable
# package index. Packages come from scripts/requirements.txt. A stamp file
# inside the venv records a hash of the requirements and the interpreter; when
# it matches and the packages import, the script exits at once. The normal pip
# cache (~/.cache/pip) is used so a rebuild does not download again.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
repo="$(cd "$here/.." && pwd)"
venv="${KLGAUGE_VENV:-$repo/.venv}"
req="$here/requirements.txt"
python="${PYTHON:-python3}"

if ! command -v "$python" >/dev/null 2>&1; then
    echo "setup_python.sh: no '$python' on PATH (set PYTHON=...)" >&2
    exit 2
fi

want="$( { cat "$req"; "$python" -c 'import sys, platform; print(sys.version, platform.machine())'; } | sha256sum | cut -d' ' -f1)"
stamp="$venv/.klgauge-requirements.sha256"

check_imports() {
    "$venv/bin/python" -c 'import numpy, scipy, torch, transformers, tokenizers, safetensors, pytest' 2>/dev/null
}

if [[ -f "$stamp" && "$(cat "$stamp")" == "$want" ]] && check_imports; then
    echo "setup_python.sh: $venv is up to date"
    exit 0
fi

if [[ ! -x "$venv/bin/python" ]]; then
    echo "setup_python.sh: creating $venv"
    "$python" -m venv "$venv"
fi

echo "setup_python.sh: installing $(grep -cvE '^\s*(#|$)' "$req") packages from $req"
"$venv/bin/python" -m pip install --upgrade --quiet pip
# Prefer an already installed or cached version that satisfies the minimums.
"$venv/bin/python" -m pip install --quiet --upgrade-strategy only-if-needed -r "$req"

if ! check_imports; then
    echo "setup_python.sh: packages installed but do not import; see the errors above" >&2
    "$venv/bin/python" -c 'import numpy, scipy, torch, transformers, tokenizers, safetensors, pytest'
    exit 1
fi
echo "$want" > "$stamp"
"$venv/bin/python" - <<'PY'
import numpy, scipy, torch, transformers, tokenizers, safetensors, pytest
for m in (numpy, scipy, torch, transformers, tokenizers, safetensors, pytest):
    print(f"  {m.__name__} {m.__version__}")
PY
echo "setup_python.sh: ready, use $venv/bin/python"
