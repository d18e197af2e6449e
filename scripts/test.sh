#!/usr/bin/env bash
# Set up (when needed) and run the whole test suite with its real parts
# (pseudo-terminals, a mosquitto broker on loopback, dearpygui under Xvfb, the C compiler).
set -uo pipefail
source "$(dirname "${BASH_SOURCE[0]}")/setup.sh" || exit 1
.venv/bin/python -m ruff check . || exit 1
bash "$(dirname "${BASH_SOURCE[0]}")/typecheck.sh" || exit 1
# the package's own byte code once, so the many processes the tests start (rig, recorder,
# controller) do not each compile it again where PYTHONDONTWRITEBYTECODE is set
.venv/bin/python -m compileall -q app sim io gui >/dev/null
.venv/bin/python -m pytest "$@"
status=$?
if [ "$status" -eq 5 ]; then
    echo "test: pytest collected no tests; that is a failure" >&2
    exit 1
fi
exit "$status"
