#!/usr/bin/env bash
# Crawl the synthetic .test web on loopback with the embedded Redis: prepares .venv and
# redis-server, then runs 'sluice demo'. Usage: ./demo.sh [sluice demo flags...]
set -euo pipefail
cd "$(dirname "$0")"
SLUICE_TEST_TOOLS=0 SLUICE_EXTRAS=".[test,bench]" source deploy/prepare.sh
exec "$VENV/bin/sluice" demo "$@"
