#!/usr/bin/env bash
# Run the sluice test suite: prepares .venv and redis-server, then runs pytest.
# Usage: ./test.sh [pytest arguments...]
set -euo pipefail
cd "$(dirname "$0")"

PYTHON="${PYTHON:-python3}"
VENV=.venv
STAMP="$VENV/.sluice-stamp"
EXTRAS='.[test,bench]'
NO_TESTS_COLLECTED=5  # pytest exit code

have() { command -v "$1" >/dev/null 2>&1; }

install_redis() {
    # Tests start their own servers on free ports, so the packaged service must not start:
    # a temporary policy-rc.d (exit 101 = "action forbidden") keeps invoke-rc.d from starting it.
    local policy=/usr/sbin/policy-rc.d added=0
    if [ ! -e "$policy" ]; then
        printf '#!/bin/sh\nexit 101\n' >"$policy" && chmod +x "$policy" && added=1
    fi
    local rc=0
    { apt-get update -q &&
      DEBIAN_FRONTEND=noninteractive apt-get install -y -q --no-install-recommends redis-server
    } || rc=$?
    if [ "$added" = 1 ]; then rm -f "$policy"; fi
    return "$rc"
}

if ! { have redis-server || have valkey-server; } || ! { have redis-cli || have valkey-cli; }; then
    if [ "$(id -u)" = 0 ] && have apt-get; then
        install_redis
    else
        echo "test.sh: redis-server and redis-cli are needed:" \
             "run 'sudo apt-get install redis-server' (or install valkey), then retry." >&2
        exit 1
    fi
fi

if [ ! -x "$VENV/bin/python" ]; then
    "$PYTHON" -m venv "$VENV"
fi

wanted="$(sha256sum pyproject.toml | cut -d' ' -f1)"
if [ ! -f "$STAMP" ] || [ "$(cat "$STAMP")" != "$wanted" ]; then
    "$VENV/bin/python" -m pip install -q -e "$EXTRAS"
    echo "$wanted" >"$STAMP"
fi

export PATH="$PWD/$VENV/bin:$PATH"
set +e
"$VENV/bin/python" -m pytest -q -p no:cacheprovider "$@"
status=$?
set -e
if [ "$status" = "$NO_TESTS_COLLECTED" ]; then
    echo "test.sh: pytest collected no tests; treating that as a failure." >&2
fi
exit "$status"
