#!/usr/bin/env bash
# Type-check the installed shape of the package: mypy -p plantrig on a tree of links
# that mirrors pyproject's package-dir mapping (app/ -> plantrig, sim/ io/ gui/ configs/
# -> plantrig.sim/.io/.gui/.configs). Run from the repository root, mypy would take the local io/
# for the standard library's io; in the link tree it is only ever plantrig.io.
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
TREE="$(mktemp -d)"
trap 'rm -rf "$TREE"' EXIT
mkdir "$TREE/plantrig"
for f in "$ROOT"/app/*.py "$ROOT"/app/py.typed; do
    [ -e "$f" ] && ln -s "$f" "$TREE/plantrig/"
done
for d in sim io gui configs; do
    ln -s "$ROOT/$d" "$TREE/plantrig/$d"
done
cd "$TREE"
"$ROOT/.venv/bin/python" -m mypy --config-file "$ROOT/pyproject.toml" \
    --cache-dir "$ROOT/.mypy_cache" -p plantrig "$@"
