#!/usr/bin/env bash
# Install everything the tests need on a fresh Debian machine, then lint and run the whole suite.
# Usage: bash tests/run.sh [extra pytest args]
set -euo pipefail
cd "$(dirname "$0")/.."

need_apt=()
command -v redis-server >/dev/null || need_apt+=(redis-server)
command -v promtool >/dev/null || need_apt+=(prometheus)
command -v chromium >/dev/null || need_apt+=(chromium)
command -v chromedriver >/dev/null || need_apt+=(chromium-driver)
command -v wrk >/dev/null || need_apt+=(wrk)
# The featurizer and scoring kernels are C extensions: pip builds them with gcc and Python.h.
command -v gcc >/dev/null || need_apt+=(gcc)
"${PYTHON:-python3}" -c 'import os, sys, sysconfig
sys.exit(not os.path.exists(os.path.join(sysconfig.get_paths()["include"], "Python.h")))' \
    || need_apt+=(python3-dev)
if [ "${#need_apt[@]}" -gt 0 ]; then
    echo "installing Debian packages: ${need_apt[*]}"
    SUDO=""
    [ "$(id -u)" -eq 0 ] || SUDO="sudo"
    $SUDO apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${need_apt[@]}" >/dev/null
fi

PY="${PYTHON:-python3}"
if [ -z "${VIRTUAL_ENV:-}" ]; then
    [ -x .venv/bin/python ] || "$PY" -m venv .venv
    PY=.venv/bin/python
fi
"$PY" -m pip install -q --upgrade pip >/dev/null
"$PY" -m pip install -q -e ".[test]"

echo "lint: ruff"
"$PY" -m ruff check service clients tests bench
"$PY" -m ruff format --check service clients tests bench

echo "tests: pytest"
set +e
"$PY" -m pytest -q -p no:cacheprovider "$@"
status=$?
set -e
if [ "$status" -eq 5 ]; then
    echo "pytest collected no tests: failing" >&2
    exit 1
fi
exit "$status"
