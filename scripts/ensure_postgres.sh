#!/usr/bin/env bash
# PostgreSQL's server programs for the store tests (the tests start their own server in a
# temporary directory, tests/pg_server.py). Installs Debian's `postgresql` package when
# initdb is missing; does nothing when it is there.
set -euo pipefail
if command -v initdb >/dev/null 2>&1 || ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; then
    exit 0
fi
echo "installing PostgreSQL (Debian package postgresql) for the store tests"
SUDO=""
if [ "$(id -u)" -ne 0 ]; then
    command -v sudo >/dev/null 2>&1 || { echo "PostgreSQL is missing: install the Debian package postgresql" >&2; exit 1; }
    SUDO="sudo"
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends postgresql >/dev/null
# the package may start a cluster of its own; the tests never use it
$SUDO service postgresql stop >/dev/null 2>&1 || true
