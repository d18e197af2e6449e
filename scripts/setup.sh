#!/usr/bin/env bash
# Set up plantrig on a fresh Debian/Ubuntu machine: system packages when missing,
# a virtual environment in .venv, and the package with its test extras.
# Sourced by scripts/demo.sh and scripts/test.sh; safe to run again.
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$ROOT"

need_apt=()
command -v mosquitto >/dev/null 2>&1 || [ -x /usr/sbin/mosquitto ] || need_apt+=(mosquitto mosquitto-clients)
command -v Xvfb >/dev/null 2>&1 || need_apt+=(xvfb)
command -v pdftoppm >/dev/null 2>&1 || need_apt+=(poppler-utils)
command -v cc >/dev/null 2>&1 || need_apt+=(gcc libc6-dev)
python3 -c "import venv, ensurepip" >/dev/null 2>&1 || need_apt+=(python3-venv)
if [ ${#need_apt[@]} -gt 0 ]; then
    echo "setup: installing system packages: ${need_apt[*]}"
    SUDO=""
    [ "$(id -u)" -ne 0 ] && SUDO="sudo"
    $SUDO apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends \
        "${need_apt[@]}" >/dev/null
fi

python3 - <<'PY'
import sys
if sys.version_info < (3, 11):
    sys.exit(f"setup: plantrig needs Python >= 3.11, found {sys.version.split()[0]}")
PY

if [ ! -x .venv/bin/python ]; then
    echo "setup: creating .venv"
    python3 -m venv .venv
fi
stamp=.venv/.plantrig-installed
# setup.py and the C kernel of plain ticks are built with the package: a change rebuilds
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ] || [ setup.py -nt "$stamp" ] \
        || [ sim/engine/_stretch.c -nt "$stamp" ]; then
    echo "setup: installing plantrig and its test extras into .venv"
    .venv/bin/python -m pip install -q --upgrade pip
    .venv/bin/python -m pip install -q -e '.[test]'
    touch "$stamp"
fi
