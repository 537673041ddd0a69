"""Job settings: TOML file < SLUICE_ environment < flags; clear errors naming the key."""

from __future__ import annotations

from pathlib import Path

import pytest

from frontier.exceptions import ConfigError
from frontier.settings import load_settings

EXAMPLE = Path(__file__).resolve().parent.parent / "config" / "example-job.toml"


def test_example_job_file_loads() -> None:
    s = load_settings(EXAMPLE)
    assert s.name == "example" and s.seeds
    assert s.fetch.user_agent and "http" in s.fetch.user_agent
    assert s.politeness.min_delay_s >= 1.0  # polite by default


def test_example_job_file_documents_sitemaps_revisit_and_focus() -> None:
    """The example names every [sitemaps] and [revisit] key with its default (so it
    crawls as a job without them), and its commented [focus], uncommented, is a valid
    [focus] naming every key, with the defaults where it does not choose the subject."""
    import tomllib

    from frontier.settings import FocusSettings, RevisitSettings, SitemapSettings

    text = EXAMPLE.read_text()
    data, loaded = tomllib.loads(text), load_settings(EXAMPLE)
    for section, model in (("sitemaps", SitemapSettings), ("revisit", RevisitSettings)):
        assert set(data[section]) == set(model.model_fields), section
        assert getattr(loaded, section) == model(), section
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("# [focus]"))
    block = []
    for line in lines[start:]:
        if not line.startswith("#"):
            break
        block.append(line[2:])
    focus = tomllib.loads("\n".join(block))["focus"]
    assert set(focus) == set(FocusSettings.model_fields)
    model = FocusSettings.model_validate(focus)
    subject = {"examples", "background", "terms"}
    default = FocusSettings(terms={"lantern": 1.0})
    assert {k: getattr(model, k) for k in focus if k not in subject} == {
        k: getattr(default, k) for k in focus if k not in subject}
    assert loaded.focus is None  # commented out: link importance alone


def test_precedence_file_env_flags(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    job = tmp_path / "job.toml"
    job.write_text('name = "filejob"\n[politeness]\nmin_delay_s = 3.0\n[fetch]\nconcurrency = 5\n')
    monkeypatch.setenv("SLUICE_POLITENESS__MIN_DELAY_S", "4.5")
    monkeypatch.setenv("SLUICE_FETCH__CONCURRENCY", "7")
    s = load_settings(job, {"fetch": {"concurrency": 9}})
    assert s.name == "filejob"  # file only
    assert s.politeness.min_delay_s == 4.5  # env beats file
    assert s.fetch.concurrency == 9  # flag beats env


@pytest.mark.parametrize("body, key", [
    ("[politeness]\nmin_delay_s = -1\n", "politeness.min_delay_s"),
    ("[fetch]\nuser_agent = 'anonymous'\n", "fetch.user_agent"),
    ("[store]\npartitions = 0\n", "store.partitions"),
    ("[scope]\nmax_deph = 3\n", "scope.max_deph"),
])
def test_invalid_file_names_the_key(tmp_path: Path, body: str, key: str) -> None:
    job = tmp_path / "bad.toml"
    job.write_text(body)
    with pytest.raises(ConfigError) as err:
        load_settings(job)
    assert key in str(err.value) and str(job) in str(err.value)


def test_not_toml_and_missing_file(tmp_path: Path) -> None:
    bad = tmp_path / "x.toml"
    bad.write_text("this is = = not toml")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_settings(bad)
    with pytest.raises(ConfigError, match="no such job file"):
        load_settings(tmp_path / "missing.toml")


def test_settings_are_frozen() -> None:
    s = load_settings(None)
    with pytest.raises(Exception):
        s.politeness.min_delay_s = 0.0  # type: ignore[misc]


@pytest.mark.parametrize("port", [0, -1, 65536])
def test_map_ports_are_tcp_ports(port: int) -> None:
    # RFC 9293 s.3.1: a TCP port is a 16-bit number; port 0 is not a destination
    with pytest.raises(ConfigError, match="map_ports"):
        load_settings(None, {"fetch": {"map_ports": [port]}})
