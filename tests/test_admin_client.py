"""`sluice host|status|seeds --admin URL`: the commands through a real daemon's admin API on
loopback, with the token, instead of Redis.

Bearer tokens: RFC 6750 s.2.1 (``Authorization: Bearer``) and s.3 (401 for a missing or
wrong token). Percent-encoding of a host or URL inside one path segment: RFC 3986 s.2.1
and s.3.3 (a "/" in a segment's data is written %2F). The API's own rules are in
frontier/admin_auth.py and tests/test_admin_auth.py.
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from frontier.admin_auth import TOKEN_ENV, local_token_path
from frontier.admin_client import AdminClient, api_base
from frontier.daemon import Daemon, serve_admin
from frontier.embedded import free_port
from frontier.exceptions import ConfigError, StoreUnavailable
from frontier.job import open_job
from frontier.model import Candidate
from frontier.redis_client import connect
from frontier.settings import load_settings
from tests.servers import RedisServer

TOKEN = "right-admin-token-for-the-client-tests-0123"
WRONG = "wrong-admin-token-for-the-client-tests-9876"
HOSTS = ("site.test", "other.test")
JOB = "remote"


async def sluice(*args: str, env: dict[str, str] | None = None,
                 timeout: float = 60.0) -> tuple[int, str, str]:
    base = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    proc = await asyncio.create_subprocess_exec(
        sys.executable, "-m", "frontier.cli", *args, env={**base, **(env or {})},
        stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE)
    out, err = await asyncio.wait_for(proc.communicate(), timeout)
    return proc.returncode or 0, out.decode(), err.decode()


def one_line_error(code: int, out: str, err: str) -> str:
    assert code == 2, (code, out, err)
    assert out == "" and err.startswith("sluice: ") and err.count("\n") == 1, (out, err)
    assert "Traceback" not in err
    assert TOKEN not in err and WRONG not in err
    return err


@pytest.fixture
async def api(redis_server: RedisServer, tmp_path: Path,
              monkeypatch: pytest.MonkeyPatch) -> AsyncIterator[dict[str, Any]]:
    """A job with two hosts, its admin API served on loopback with TOKEN."""
    client = connect(redis_server.url)
    await client.flushall()
    await client.aclose()
    settings = load_settings(None, {"name": JOB, "redis": {"url": redis_server.url},
                                    "state_dir": str(tmp_path / "state"),
                                    "seeds": [f"http://{h}/" for h in HOSTS]})
    token_file = tmp_path / "token"
    token_file.write_text(TOKEN + "\n")
    wrong_file = tmp_path / "wrong"
    wrong_file.write_text(WRONG + "\n")
    async with open_job(settings) as job:
        await job.admission.admit([Candidate(f"http://{h}/", depth=0) for h in HOSTS])
        address = f"127.0.0.1:{free_port()}"
        monkeypatch.setenv(TOKEN_ENV, TOKEN)
        runner = await serve_admin(Daemon(job, CollectorRegistry()), address)
        monkeypatch.delenv(TOKEN_ENV)
        try:
            yield {"url": f"http://{address}", "job": job, "redis": redis_server.url,
                   "token": str(token_file), "wrong": str(wrong_file), "tmp": tmp_path}
        finally:
            await runner.cleanup()


async def state_of(api: dict[str, Any], host: str) -> str:
    return str((await api["job"].store.host_info(host))["state"])


async def test_a_pause_through_the_api_pauses(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["token"],
                                  HOSTS[0], "pause")
    assert code == 0, err
    shown = json.loads(out)
    assert shown["host"] == HOSTS[0] and shown["action"] == "pause" and shown["state"] == "paused"
    assert await state_of(api, HOSTS[0]) == "paused"
    assert await state_of(api, HOSTS[1]) == "active"
    assert TOKEN not in out + err


async def test_a_wrong_token_is_one_line_and_changes_nothing(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["wrong"],
                                  HOSTS[0], "block")
    line = one_line_error(code, out, err)
    assert "refused the token" in line and "401" in line and api["wrong"] in line
    code, out, err = await sluice("seeds", "add", "--admin", api["url"], "http://site.test/new",
                                  env={TOKEN_ENV: WRONG})
    assert "refused the token from SLUICE_ADMIN_TOKEN" in one_line_error(code, out, err)
    assert await state_of(api, HOSTS[0]) == "active"
    assert (await api["job"].store.counts()).admitted == len(HOSTS)


async def test_a_change_without_a_token_says_where_to_put_one(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], HOSTS[0], "pause")
    line = one_line_error(code, out, err)
    assert "--token-file" in line and TOKEN_ENV in line and "--state" in line
    assert await state_of(api, HOSTS[0]) == "active"


async def test_the_token_comes_from_the_variable_or_the_state_folder(
        api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], HOSTS[0], "pause",
                                  env={TOKEN_ENV: TOKEN})
    assert code == 0 and json.loads(out)["state"] == "paused", err
    # an API started without an operator's token keeps its own in the state folder
    state = api["tmp"] / "state"
    address = f"127.0.0.1:{free_port()}"
    runner = await serve_admin(Daemon(api["job"], CollectorRegistry()), address)
    try:
        token = local_token_path(state).read_text().strip()
        assert token != TOKEN
        code, out, err = await sluice("host", "--admin", address, "--state", str(state),
                                      HOSTS[1], "pause")
        assert code == 0 and json.loads(out)["state"] == "paused", err
        assert token not in out + err
        # the operator's token is not that API's token
        code, out, err = await sluice("host", "--admin", address, "--token-file", api["token"],
                                      HOSTS[1], "resume")
        assert "refused the token" in one_line_error(code, out, err)
    finally:
        await runner.cleanup()
    assert await state_of(api, HOSTS[1]) == "paused"


async def test_status_and_host_list_print_what_the_redis_path_prints(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["token"],
                                  HOSTS[1], "boost", "3")
    assert code == 0, err
    for args in (("status",), ("host", "list", "--json"), ("host", "list"),
                 ("host", "list", "--only", "boosted", "--json")):
        code, direct, err = await sluice(*args, "--redis", api["redis"], "--job", JOB)
        assert code == 0, err
        code, remote, err = await sluice(*args, "--admin", api["url"], "--job", JOB)
        assert code == 0, err
        assert remote == direct, args
    rows = json.loads(remote)
    assert [r["host"] for r in rows] == [HOSTS[1]] and rows[0]["boost"] == 3


async def test_seeds_through_the_api_are_checked_like_the_redis_path(
        api: dict[str, Any]) -> None:
    urls = ["http://site.test/a", "not a url", "http://elsewhere.test/", "http://other.test/b"]
    code, remote, remote_err = await sluice("seeds", "add", "--admin", api["url"],
                                            "--token-file", api["token"], *urls)
    assert code == 0, remote_err
    got = json.loads(remote)
    assert got["added"] == 2 and got["known"] == 0
    # every rejected seed named by its own position among the arguments, as on the Redis path
    assert [(r["source"], r["line"]) for r in got["rejected"]] == [("argument", 2), ("argument", 3)]
    assert "outside the job's scope" in got["rejected"][1]["reason"]
    code, direct, direct_err = await sluice("seeds", "add", "--redis", api["redis"], "--job", JOB,
                                            *urls)
    assert code == 0, direct_err
    again = json.loads(direct)
    assert again["known"] == 2 and again["rejected"] == got["rejected"]
    assert remote_err == direct_err  # the same lines about the rejected seeds
    assert (await api["job"].store.counts()).admitted == len(HOSTS) + 2


async def test_refused_input_comes_back_as_the_apis_one_line(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["token"],
                                  HOSTS[0], "explode")
    remote = one_line_error(code, out, err)
    code, out, err = await sluice("host", "--redis", api["redis"], "--job", JOB,
                                  HOSTS[0], "explode")
    assert remote == one_line_error(code, out, err)  # the same check, the same words
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["token"],
                                  "never-seen.test", "pause")
    assert "unknown host" in one_line_error(code, out, err)
    # a host named by a URL travels as one path segment, '/' escaped (RFC 3986 s.3.3)
    code, out, err = await sluice("host", "--admin", api["url"], "--token-file", api["token"],
                                  f"http://{HOSTS[0]}/some/page?x=1", "pause")
    assert code == 0 and json.loads(out)["host"] == HOSTS[0], err


async def test_nothing_listening_is_one_line(tmp_path: Path) -> None:
    address = f"http://127.0.0.1:{free_port()}"
    code, out, err = await sluice("status", "--admin", address)
    assert "cannot connect" in one_line_error(code, out, err)
    code, out, err = await sluice("host", "--admin", address, HOSTS[0], "pause",
                                  env={TOKEN_ENV: TOKEN})
    assert "cannot connect" in one_line_error(code, out, err)


async def test_another_jobs_api_is_refused(api: dict[str, Any]) -> None:
    code, out, err = await sluice("host", "--admin", api["url"], "--job", "other-job",
                                  "--token-file", api["token"], HOSTS[0], "pause")
    assert f"serves job '{JOB}', not 'other-job'" in one_line_error(code, out, err)
    assert await state_of(api, HOSTS[0]) == "active"


async def test_flags_that_do_not_go_together(api: dict[str, Any]) -> None:
    code, out, err = await sluice("status", "--admin", api["url"], "--redis", api["redis"])
    assert "give one" in one_line_error(code, out, err)
    code, out, err = await sluice("status", "--redis", api["redis"])
    assert "--job is needed" in one_line_error(code, out, err)
    code, out, err = await sluice("status", "--redis", api["redis"], "--job", JOB,
                                  "--token-file", api["token"])
    assert "--token-file goes with --admin" in one_line_error(code, out, err)


@pytest.mark.parametrize(("raw", "base"), [
    ("http://127.0.0.1:8700", "http://127.0.0.1:8700"),
    ("http://127.0.0.1:8700/", "http://127.0.0.1:8700"),
    ("127.0.0.1:8700", "http://127.0.0.1:8700"),
    ("http://[::1]:8700", "http://[::1]:8700"),
    ("http://localhost:8700/sluice/", "http://localhost:8700/sluice"),
])
def test_admin_addresses(raw: str, base: str) -> None:
    assert str(api_base(raw)) == base


@pytest.mark.parametrize(("raw", "why"), [
    ("ftp://127.0.0.1:8700", "not an http:// address"),
    ("http://:tok@127.0.0.1:8700", "a user or password in the address"),
    ("http://127.0.0.1:8700/?token=x", "no ?query"),
    ("127.0.0.1", "no port"),
    ("http://127.0.0.1:99999", "not an address"),
])
def test_admin_addresses_refused(raw: str, why: str) -> None:
    with pytest.raises(ConfigError, match=why.replace("?", r"\?")) as caught:
        api_base(raw)
    assert "tok@" not in str(caught.value)


@pytest.mark.parametrize(("status", "body", "kind", "words"), [
    (403, b'{"error": "unknown Host header"}', ConfigError, "refused the request (403: unknown"),
    (400, b'{"error": "host: bad\\nname"}', ConfigError, "host: bad name"),
    (503, b'{"error": "Redis unavailable during counts"}', StoreUnavailable, "Redis unavailable"),
    (502, b"<html>proxy error</html>", Exception, "HTTP 502 (is this a sluice admin API?)"),
])
def test_answers_other_than_200_become_one_line(status: int, body: bytes, kind: type,
                                                 words: str) -> None:
    # what frontier/daemon.py's error_response and the guard send (a proxy's page for 502)
    client = AdminClient(api_base("127.0.0.1:8700"), TOKEN, "test")
    with pytest.raises(kind) as caught:
        client._answer(status, body)
    assert words in str(caught.value) and "\n" not in str(caught.value)
    assert TOKEN not in str(caught.value)
