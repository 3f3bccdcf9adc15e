#!/usr/bin/env bash
# The project's one test command (README, "Quick start"); CI runs exactly this through .ci/run.
# On a fresh Debian machine it installs the cross toolchains (when root), the package with its
# test extras, then runs the whole suite on both cores.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/install-toolchains.sh
python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore '.[test]'
exec python3 -m pytest -n 2 -q "$@"
