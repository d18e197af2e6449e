#!/usr/bin/env bash
# Set up (when needed) and run the built-in demo: no hardware needed.
set -euo pipefail
source "$(dirname "${BASH_SOURCE[0]}")/setup.sh"
.venv/bin/plantrig check configs/conveyor.toml
if .venv/bin/plantrig demo --help >/dev/null 2>&1; then
    exec .venv/bin/plantrig demo "$@"
fi
exec .venv/bin/plantrig run configs/conveyor.toml --realtime "$@"
