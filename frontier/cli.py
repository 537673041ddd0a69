"""The ``sluice`` command: crawl, daemon, worker, demo, host, status, explain, bench (whose
flags and dispatch are in ``frontier/bench/cli.py``)."""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import sys
from pathlib import Path
from typing import Any

from prometheus_client import CollectorRegistry

from frontier.bench.cli import add_bench_command
from frontier.cli_types import positive
from frontier.exceptions import ConfigError, DiskFault, SluiceError
from frontier.process import crawl_process
from frontier.process import run as run_loop
from frontier.runner import EXIT_DISK_FAULT, default_processes, watch_signals
from frontier.settings import JobSettings, load_settings

log = logging.getLogger("sluice")

# Exit status of sluice crawl and sluice worker (and every command): 0 done (or stopped
# by a signal, resumable), 2 an error (a bad setting, Redis unreachable), EXIT_DISK_FAULT
# (3) the output folder cannot be written (disk full, quota, read-only, gone): the worker
# stopped leasing and handed its leases back; free space and run the same command again.


# -- flags shared by crawl and daemon --------------------------------------------------------

def _job_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", type=Path, help="job file (TOML)")
    p.add_argument("--job", help="job name")
    p.add_argument("--redis", help="redis:// URL (a Cluster: redis+cluster://); none: embedded")
    p.add_argument("--seeds", type=Path, help="file of seed URLs, one a line")
    p.add_argument("--sitemap", action="append", default=[], metavar="URL",
                   help="a sitemap (or sitemap index) to read (repeatable; docs/sitemaps.md)")
    p.add_argument("--max-pages", type=int)
    p.add_argument("--max-pages-per-host", type=int)
    p.add_argument("--max-depth", type=int)
    p.add_argument("--concurrency", type=int)
    p.add_argument("--min-delay", type=float, help="seconds between fetches of one host")
    p.add_argument("--user-agent", help="an honest User-Agent with a contact URL")
    p.add_argument("--map-hosts", action="append", default=[], metavar="PATTERN=ADDR",
                   help="send PATTERN's hosts to ADDR[:PORT] (e.g. '*.test=127.0.0.1:8080')")
    p.add_argument("--map-port", action="append", type=int, default=[], metavar="PORT",
                   help="a URL port a port-less --map-hosts entry keeps (repeatable; "
                   "default 80 and 443)")
    p.add_argument("--map-remote", action="store_true", default=None,
                   help="allow --map-hosts entries to non-loopback addresses")
    p.add_argument("--allow-host", action="append", default=[], help="extra in-scope host pattern")
    p.add_argument("--state", type=Path, help="state folder of the embedded Redis")
    p.add_argument("--revisit", action="store_true", default=None,
                   help="keep fetched pages fresh: revisit each as its changes suggest "
                   "(runs until stopped or --max-pages fetches; docs/revisits.md)")


def _overrides(a: argparse.Namespace) -> dict[str, Any]:
    o: dict[str, Any] = {}

    def put(path: str, value: Any) -> None:
        if value is None or value == []:
            return
        node = o
        *parents, leaf = path.split(".")
        for part in parents:
            node = node.setdefault(part, {})
        node[leaf] = value

    put("name", a.job)
    put("redis.url", a.redis)
    put("budget.max_pages", a.max_pages)
    put("budget.max_pages_per_host", a.max_pages_per_host)
    put("scope.max_depth", a.max_depth)
    put("scope.allow_hosts", a.allow_host)
    put("fetch.concurrency", getattr(a, "concurrency", None))
    put("politeness.min_delay_s", a.min_delay)
    put("fetch.user_agent", a.user_agent)
    put("fetch.map_hosts", a.map_hosts)
    put("fetch.map_ports", a.map_port)
    put("fetch.map_remote", a.map_remote)
    put("revisit.enabled", getattr(a, "revisit", None))
    put("state_dir", str(a.state) if a.state else None)
    put("sitemaps.urls", a.sitemap)
    if a.seeds:
        from frontier.job import read_seeds
        put("seeds", read_seeds(a.seeds))
    return o


# settings whose flag is not --<last part of the key, dashed>
SETTING_FLAGS = {"name": "--job", "redis.url": "--redis", "scope.allow_hosts": "--allow-host",
                 "politeness.min_delay_s": "--min-delay", "fetch.map_ports": "--map-port",
                 "state_dir": "--state", "seeds": "--seeds", "sitemaps.urls": "--sitemap"}


def _flag_of(loc: tuple[Any, ...]) -> str:
    """The flag that sets the setting at ``loc`` (a pydantic error location)."""
    names = [str(part) for part in loc if not isinstance(part, int)]
    return SETTING_FLAGS.get(".".join(names)) or "--" + names[-1].replace("_", "-")


def _check_flags(flags: dict[str, Any]) -> None:
    """Validate what the flags set on their own, so an error names the flag (the job file
    and the environment are checked, and named, by load_settings)."""
    from pydantic import ValidationError

    def given(loc: tuple[Any, ...]) -> bool:
        node: Any = flags
        for part in loc:
            if isinstance(part, int):
                return True
            if not isinstance(node, dict) or part not in node:
                return False
            node = node[part]
        return True

    try:
        JobSettings.model_validate(flags)
    except ValidationError as exc:
        problems = [f"{_flag_of(e['loc'])} {e.get('input')!r}: "
                    f"{str(e['msg']).removeprefix('Value error, ')}"
                    for e in exc.errors() if e["loc"] and given(e["loc"])]
        if problems:
            raise ConfigError("; ".join(problems)) from None


def _settings(a: argparse.Namespace, **extra: Any) -> JobSettings:
    o = _overrides(a)
    _check_flags(o)
    for k, v in extra.items():
        o.setdefault(k, v)
    return load_settings(a.config, o)


# -- commands -----------------------------------------------------------------------------

def cmd_crawl(a: argparse.Namespace) -> int:
    from frontier.folders import writable_folder

    out = Path(a.out)
    settings = _settings(a, state_dir=str(out / "state"))
    writable_folder(out, "--out")
    if settings.redis.url is None:
        writable_folder(settings.state_dir, "--state" if a.state else "state_dir")
    from frontier.runner import crawl

    processes = a.processes or default_processes(embedded=settings.redis.url is None)
    summary = run_loop(crawl(settings, out, workers=a.workers, processes=processes,
                             quiet=a.quiet, admin=a.admin, progress_every=a.progress_every))
    print(json.dumps(summary, indent=2))
    return 0


def cmd_daemon(a: argparse.Namespace) -> int:
    from frontier.daemon import Daemon, serve_admin
    from frontier.job import admit_seeds, open_job
    from frontier.redis_client import redacted

    settings = _settings(a)

    async def run() -> None:
        async with open_job(settings) as job:
            if settings.seeds:
                res = await admit_seeds(job, settings.seeds)
                log.info("seeds: %s", res)
            daemon = Daemon(job, CollectorRegistry())
            stop = asyncio.Event()
            watch_signals(stop.set)
            runner = await serve_admin(daemon, a.admin) if a.admin else None
            where = redacted(settings.redis.url) if settings.redis.url else "embedded Redis"
            print(f"sluice daemon: job {settings.name} on {where}"
                  + (f", admin http://{a.admin}/" if a.admin else ""), flush=True)
            try:
                await daemon.run(stop)
            finally:
                if runner is not None:
                    await runner.cleanup()

    run_loop(run())
    return 0


def cmd_worker(a: argparse.Namespace) -> int:
    from frontier.daemon import metrics_app, serve
    from frontier.job import open_job
    from frontier.metrics import WorkerMetrics
    from frontier.runner import run_together
    from workers.loop import Worker

    base = load_settings(None, {"name": a.job, "redis": {"url": a.redis}})
    processes = a.processes or default_processes(embedded=False)
    if processes > 1:
        from frontier.runner import run_worker_processes, worker_command
        if a.metrics:
            raise ConfigError("--metrics serves one process: give it with --processes 1 "
                              "(run one such command per metrics address)")

        async def stored() -> JobSettings:  # the job exists and Redis answers: else say so here
            async with open_job(base, stored=True) as job:
                return job.settings

        settings = run_loop(stored())
        command = worker_command(a.redis, a.job, Path(a.out), workers=a.workers,
                                 concurrency=a.concurrency, drain=a.drain)
        return run_loop(run_worker_processes(command, processes, settings.fetch.stop_grace_s))

    async def run() -> int:
        async with open_job(base, stored=True) as job:
            if a.concurrency:
                fetch = job.settings.fetch.model_copy(update={"concurrency": a.concurrency})
                job.store.settings = job.settings.model_copy(update={"fetch": fetch})
            registry = CollectorRegistry()
            metrics = WorkerMetrics(registry)
            crew = [Worker(job.store, job.admission, Path(a.out), metrics=metrics,
                           drain=a.drain) for _ in range(a.workers)]
            watch_signals(lambda: [w.stop() for w in crew], lambda: [w.abandon() for w in crew])
            runner = await serve(metrics_app(registry), a.metrics) if a.metrics else None
            try:
                with crawl_process():
                    await run_together(crew)
            finally:
                if runner is not None:
                    await runner.cleanup()
            print(json.dumps({"pages": sum(w.pages for w in crew)}))
            return 0

    return run_loop(run())


def _stored_job(a: argparse.Namespace) -> JobSettings:
    """Where a job lives: --redis URL, or the embedded server of the --state folder."""
    overrides: dict[str, Any] = {"name": a.job, "redis": {"url": a.redis}}
    if a.state:
        overrides["state_dir"] = str(a.state)
    return load_settings(None, overrides)


def _admin_flags(p: argparse.ArgumentParser, *, api: bool = False) -> None:
    p.add_argument("--redis", help="redis:// URL; none: the embedded server of --state")
    p.add_argument("--job", required=not api,
                   help="the job's name (with --admin: checked against the API's job)"
                   if api else None)
    p.add_argument("--state", type=Path,
                   help="state folder of an embedded job (sluice crawl: OUT/state)"
                   + ("; with --admin, where its admin-token file is" if api else ""))
    if api:
        p.add_argument("--admin", metavar="URL",
                       help="go through the admin API of a running daemon or crawl, e.g. "
                       "http://127.0.0.1:8700, instead of Redis")
        p.add_argument("--token-file", type=Path, metavar="FILE",
                       help="with --admin: the file holding the admin token (else "
                       "SLUICE_ADMIN_TOKEN, else STATE/admin-token with --state)")


def _admin_api(a: argparse.Namespace) -> Any:
    """The admin API client for ``--admin URL``; None when the job is reached through
    Redis (``--redis`` or ``--state``), which needs ``--job``."""
    if a.admin is None:
        if a.token_file is not None:
            raise ConfigError("--token-file goes with --admin URL")
        if a.job is None:
            raise ConfigError("--job is needed (or --admin URL of the job's running daemon)")
        return None
    if a.redis is not None:
        raise ConfigError("--admin and --redis: give one (the admin API reaches the job's "
                          "Redis itself)")
    from frontier.admin_client import client_for
    return client_for(a.admin, a.token_file, a.state)


def cmd_host(a: argparse.Namespace) -> int:
    """`sluice host HOST ACTION [VALUE]` or `sluice host list`; frontier.controls checks input."""
    from frontier import controls
    from frontier.job import open_job

    listing = a.host == "list" and a.action is None
    if not listing and a.action is None:
        raise ConfigError(f"action: one is needed ({', '.join(controls.HOST_ACTIONS)}), "
                          "or 'sluice host list'")
    if not listing and a.only is not None:
        raise ConfigError("--only goes with 'sluice host list'")
    if listing and a.new:
        raise ConfigError("--new goes with a host action")
    which = controls.list_filter(a.only) if listing else None
    api = _admin_api(a)
    if api is not None:
        async def remote() -> None:
            async with api:
                await api.check_job(a.job)
                if listing:
                    rows = await api.hosts(which)
                    print(json.dumps(rows, indent=2) if a.json else controls.format_host_list(rows))
                    return
                print(json.dumps(await api.control(a.host, a.action, a.value, new=a.new),
                                 indent=2, default=str))

        run_loop(remote())
        return 0
    base = _stored_job(a)

    async def run() -> None:
        async with open_job(base, stored=True) as job:
            if listing:
                rows = await job.store.controlled_hosts(which)
                print(json.dumps(rows, indent=2) if a.json else controls.format_host_list(rows))
                return
            command = controls.host_command(job.store.settings, a.host, a.action, a.value,
                                            new=a.new)
            print(json.dumps(await controls.apply(job.store, command), indent=2, default=str))

    run_loop(run())
    return 0


def cmd_status(a: argparse.Namespace) -> int:
    from frontier.job import open_job
    from frontier.mirrors import read_mirrors
    from frontier.revisit_store import read_revisits

    api = _admin_api(a)
    if api is not None:
        async def remote() -> dict[str, Any]:
            async with api:
                return await api.status(a.job)

        print(json.dumps(run_loop(remote()), indent=2))
        return 0
    base = _stored_job(a)

    async def run() -> None:
        async with open_job(base, stored=True) as job:
            counts = await job.store.counts()
            data = counts.as_dict()
            data["balanced"] = counts.balanced
            data["mirrors"] = await read_mirrors(job.store)  # hosts that copy other hosts
            data["revisits"] = await read_revisits(job.store)  # pages due, fresh; None: off
            print(json.dumps(data, indent=2))

    run_loop(run())
    return 0


def cmd_explain(a: argparse.Namespace) -> int:
    from frontier.explain import explain, format_explain
    from frontier.job import open_job

    base = _stored_job(a)

    async def run() -> None:
        async with open_job(base, stored=True) as job:
            data = await explain(job.store, a.url)
            print(json.dumps(data, indent=2, default=str) if a.json else format_explain(data))

    run_loop(run())
    return 0


def cmd_seeds(a: argparse.Namespace) -> int:
    """`sluice seeds add URL... [--file FILE]`: check each seed, add those in the job's
    scope to the job (a running crawl's too); rejected ones are reported one by one."""
    from frontier.job import open_job
    from frontier.seeds import (
        RejectedSeed, SeedList, add_seeds, parse_seed_lines, read_seed_file, report_rejected,
    )

    if not a.urls and a.file is None:
        raise ConfigError("seeds add: give seed URLs, or --file FILE with one URL a line")
    seeds = SeedList()
    if a.urls:
        seeds.extend(parse_seed_lines(a.urls, source="argument"))
    if a.file is not None:
        seeds.extend(read_seed_file(a.file, label="--file"))
    api = _admin_api(a)
    base = _stored_job(a) if api is None else None

    async def run() -> dict[str, Any]:
        if not seeds.accepted:
            return {"added": 0, "known": 0, "rejected": [r.as_dict() for r in seeds.rejected]}
        if api is not None:
            async with api:
                await api.check_job(a.job)
                return await api.add_seeds(seeds)
        assert base is not None
        async with open_job(base, stored=True) as job:
            return await add_seeds(job, seeds)

    result = run_loop(run())
    report_rejected(RejectedSeed(**r) for r in result["rejected"])
    print(json.dumps(result, indent=2))
    if result["added"] + result["known"] == 0:
        raise ConfigError(f"no seed added: {len(result['rejected'])} rejected (see above); "
                          "give absolute URLs in the job's scope, one each")
    return 0


def cmd_demo(a: argparse.Namespace) -> int:
    from frontier.demo import run_demo
    return run_demo(Path(a.out), hosts=a.hosts, pages=a.pages, max_pages=a.max_pages,
                    quiet=a.quiet, sitemaps=a.sitemaps, sitemap_urls=tuple(a.sitemap))



def parser() -> argparse.ArgumentParser:
    p = _Parser(prog="sluice", description="A polite, prioritised crawl frontier on Redis.")
    p.add_argument("-v", "--verbose", action="store_true")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("crawl", help="scheduler and workers in one process")
    _job_flags(c)
    c.add_argument("--out", required=True, help="output folder (WARC files, fetch log, state)")
    c.add_argument("--workers", type=positive(int), default=1,
                   help="worker loops in each worker process (default 1)")
    c.add_argument("--processes", type=positive(int), metavar="N",
                   help="worker processes (default: one per core, less one for the embedded "
                   "Redis); 1 runs the worker in this process")
    c.add_argument("--progress-every", type=positive(float), metavar="SECONDS",
                   help="seconds between progress lines when the output is not a terminal "
                   "(default 5)")
    c.add_argument("--admin", help="HOST:PORT for the admin API and /metrics")
    c.add_argument("--quiet", action="store_true", help="no live progress")
    c.set_defaults(func=cmd_crawl)

    d = sub.add_parser("daemon", help="the scheduler of a job shared by many workers")
    _job_flags(d)
    d.add_argument("--admin", help="HOST:PORT for the admin API, status page and /metrics")
    d.set_defaults(func=cmd_daemon)

    w = sub.add_parser("worker", help="a fetch worker for a job started by a daemon")
    w.add_argument("--redis", required=True)
    w.add_argument("--job", required=True)
    w.add_argument("--out", required=True)
    w.add_argument("--concurrency", type=int)
    w.add_argument("--processes", type=positive(int), metavar="N",
                   help="worker processes (default: one per core)")
    w.add_argument("--workers", type=positive(int), default=1,
                   help="worker loops in each worker process (default 1)")
    w.add_argument("--metrics", help="HOST:PORT for /metrics")
    w.add_argument("--drain", action="store_true", help="exit once nothing is queued or leased")
    w.set_defaults(func=cmd_worker)

    h = sub.add_parser("host", help="pause, resume, block, unblock, boost, delay or clear a "
                       "host; 'sluice host list' shows the hosts under control")
    _admin_flags(h, api=True)
    h.add_argument("host", help="a host name or a URL of the host (or 'list')")
    h.add_argument("action", nargs="?", help="pause, resume, block, unblock, boost VALUE, "
                   "delay VALUE or clear")
    h.add_argument("value", nargs="?", help="boost: priority multiplier (0.001 to 1000); "
                   "delay: seconds (0 to politeness.max_delay_s)")
    h.add_argument("--new", action="store_true",
                   help="act on a host the frontier has no record of yet")
    h.add_argument("--only", metavar="STATE",
                   help="host list: only paused, blocked, boosted or delayed hosts")
    h.add_argument("--json", action="store_true", help="host list: as JSON")
    h.set_defaults(func=cmd_host)

    s = sub.add_parser("status", help="URL counts by state")
    _admin_flags(s, api=True)
    s.set_defaults(func=cmd_status)

    e = sub.add_parser("explain", help="why a URL has its priority")
    e.add_argument("url")
    _admin_flags(e)
    e.add_argument("--json", action="store_true")
    e.set_defaults(func=cmd_explain)

    sd = sub.add_parser("seeds", help="add seeds to a job, a running crawl's too")
    sd_sub = sd.add_subparsers(dest="seeds_command", required=True)
    sa = sd_sub.add_parser("add", help="check seed URLs and add those in the job's scope")
    _admin_flags(sa, api=True)
    sa.add_argument("urls", nargs="*", metavar="URL", help="seed URLs")
    sa.add_argument("--file", type=Path, help="a file of seed URLs, one a line")
    sa.set_defaults(func=cmd_seeds)

    m = sub.add_parser("demo", help="crawl the synthetic .test web on the embedded Redis")
    m.add_argument("--out", default="demo-out",
                   help="output folder; running again resumes (delete it to start afresh)")
    m.add_argument("--hosts", type=int, default=60, help="ordinary .test sites to invent")
    m.add_argument("--pages", type=int, default=3000, help="pages over those sites")
    m.add_argument("--max-pages", type=int, default=2000, help="the crawl's page budget")
    m.add_argument("--quiet", action="store_true", help="no live progress")
    m.add_argument("--sitemaps", action="store_true",
                   help="give some sites sitemaps (pages no link reaches, a hostile one)")
    m.add_argument("--sitemap", action="append", default=[], metavar="URL",
                   help="a sitemap to read (repeatable)")
    m.set_defaults(func=cmd_demo)

    add_bench_command(sub)
    return p


class _Parser(argparse.ArgumentParser):
    """Usage errors in one line: what is wrong, and where the help is."""

    def error(self, message: str) -> Any:
        self.exit(2, f"{self.prog}: {message} (see '{self.prog} --help')\n")


def main(argv: list[str] | None = None) -> int:
    a = parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO if a.verbose else logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        if getattr(a, "redis", None) is not None:
            from frontier.redis_client import check_redis_url
            check_redis_url(a.redis, "--redis")  # before anything connects anywhere
        return int(a.func(a))
    except DiskFault as exc:  # the worker handed back what it held; one line says what to do
        print(f"sluice: {exc}", file=sys.stderr)
        return EXIT_DISK_FAULT
    except SluiceError as exc:
        print(f"sluice: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
