#!/usr/bin/env bash
# Run the sluice test suite: prepares .venv and redis-server, then runs pytest.
# Usage: ./test.sh [pytest arguments...]
set -euo pipefail
cd "$(dirname "$0")"
source deploy/prepare.sh

NO_TESTS_COLLECTED=5  # pytest's exit code when it ran nothing
set +e
"$VENV/bin/python" -m pytest -q -p no:cacheprovider "$@"
status=$?
set -e
if [ "$status" = "$NO_TESTS_COLLECTED" ]; then
    echo "test.sh: pytest collected no tests; treating that as a failure." >&2
fi
exit "$status"
