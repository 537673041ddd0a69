"""Link-spam signals of the frontier, each against a small graph worked out by hand.

Every test runs on one Redis server and on a Redis Cluster (the ``make_store`` fixture).
Sources: TrustRank (Gyöngyi, Garcia-Molina & Pedersen, "Combating Web Spam with
TrustRank", VLDB 2004): trust starts at the seeds, a host hands on damping x its trust
split over the hosts it links to, and untrusted hosts hand on nothing; reciprocal links
(Wu & Davison, "Identifying link farm spam pages", WWW 2005): a farm's hosts link to the
hosts that link to them; budgets by the reputation of the linking hosts (in the spirit of
Lee, Leonard, Wang & Loguinov, "IRLbot", WWW 2008); endorsement: IRLbot ranks a domain by
its in-degree from other domains; counted here over trusted hosts and one-way links only
(Wu & Davison's reciprocity), an untrusted host with enough such linking hosts is ranked
and paced as a trusted one.
"""

from __future__ import annotations

import pytest

from frontier.admission import TRUST_SPLIT_MIN_HOSTS, Admission
from frontier.controls import host_command
from frontier.exceptions import ConfigError
from frontier.explain import explain, format_explain
from frontier.keys import partition_of
from frontier.model import Candidate, Completion, Lease, Outcome
from frontier.store import FrontierStore
from frontier.urls import Scope
from tests.conftest import Clock, StoreFactory

DAMPING = 0.85  # TrustRank's beta, the default trust_damping
SEED_SHARE = DAMPING * 1.0 / TRUST_SPLIT_MIN_HOSTS  # a seed's host splits over >= 20 hosts


def spam_store(make_store: StoreFactory, **priority: float) -> FrontierStore:
    return make_store(politeness={"min_delay_s": 0.0, "response_time_factor": 0.0},
                      budget={"max_pages_per_host": None}, priority=priority)


def admission(store: FrontierStore) -> Admission:
    return Admission(store, Scope(allow=[], include=[], exclude=[], max_depth=None))


async def trust_of(store: FrontierStore, host: str) -> float:
    return float((await store.host_info(host))["trust"])


async def lease_seeds(store: FrontierStore, adm: Admission, hosts: list[str]) -> list[Lease]:
    """Admit one seed per host, lease and fetch them all (the lease carries each host's
    trust; the store remembers it for the links its pages give)."""
    await adm.admit([Candidate(f"http://{h}/", depth=0) for h in hosts])
    leases: list[Lease] = []
    while len(leases) < len(hosts):
        got = await store.lease(len(hosts))
        assert got
        leases += got
    await store.complete_many([Completion(lease, Outcome.FETCHED) for lease in leases])
    return leases


def links(source: str, targets: list[str], page: str = "p",
          trust: float | None = None) -> list[Candidate]:
    return [Candidate(f"http://{t}/{page}", depth=1, cash=0.01, source_host=source,
                      source_trust=trust) for t in targets]


async def test_trust_flows_from_the_seeds_split_and_counted_once(make_store: StoreFactory) -> None:
    # TrustRank (Gyöngyi et al. 2004): a seed's host holds trust 1 and hands on 0.85 x 1
    # split over the hosts it links to (at least 20 assumed: 0.0425 each); each linking
    # host counts once; the sum is the target's trust.
    store = spam_store(make_store)
    adm = admission(store)
    leases = await lease_seeds(store, adm, ["s.test", "t.test"])
    assert {lease.host: (lease.trust, lease.suspect) for lease in leases} == {
        "s.test": (1.0, False), "t.test": (1.0, False)}
    await adm.admit(links("s.test", ["a.test", "b.test"]))  # trust from s.test's lease
    assert await trust_of(store, "a.test") == pytest.approx(SEED_SHARE)
    await adm.admit(links("s.test", ["a.test"], page="again"))  # the same host again: no more
    assert await trust_of(store, "a.test") == pytest.approx(SEED_SHARE)
    await adm.admit(links("t.test", ["a.test"]))  # a second seed host: 0.0425 + 0.0425
    assert await trust_of(store, "a.test") == pytest.approx(2 * SEED_SHARE)
    assert await trust_of(store, "b.test") == pytest.approx(SEED_SHARE)
    # a host that links to 30 hosts splits its trust over 30: 0.85 / 30 each
    await adm.admit(links("t.test", [f"w{i}.test" for i in range(30)], page="wide"))
    assert await trust_of(store, "w7.test") == pytest.approx(DAMPING / 30)


async def test_untrusted_hosts_hand_on_no_trust(make_store: StoreFactory) -> None:
    # TrustRank: only trust flows, so a host below the vouch threshold (0.05) hands on
    # nothing, and a farm cannot raise its own trust by linking to itself.
    store = spam_store(make_store)
    adm = admission(store)
    await adm.admit(links("low.test", ["x.test"], trust=0.04))
    assert await trust_of(store, "x.test") == 0.0
    await adm.admit(links("mid.test", ["x.test"], trust=0.5))  # 0.85 x 0.5 / 20
    assert await trust_of(store, "x.test") == pytest.approx(0.02125)


async def test_budget_grows_with_trusted_linking_hosts(make_store: StoreFactory) -> None:
    # Budgets by reputation (Lee et al. 2008, weighted): base 2 + 3 per trusted linking host
    # + 1 per other linking host. Two trusted and three untrusted hosts link in:
    # 2 + 3 x 2 + 1 x 3 = 11.
    store = make_store(budget={"max_pages_per_host": None},
                       priority={"host_budget_base": 2, "host_budget_per_linking_host": 3,
                                 "host_budget_per_untrusted_host": 1})
    adm = admission(store)
    offered = (links("good1.test", ["x.test"], trust=1.0) + links("good2.test", ["x.test"], trust=0.3)
               + [c for i in range(3) for c in links(f"weak{i}.test", ["x.test"], trust=0.01)])
    offered += [Candidate(f"http://x.test/{i}", depth=2, source_host="x.test") for i in range(20)]
    res = await adm.admit(offered)
    info = await store.host_info("x.test")
    assert int(info["admitted"]) == 11 and res.new == 11
    counts = await store.counts()
    assert counts.reasons["excluded:host_link_budget"] == res.excluded and counts.balanced


async def farm(store: FrontierStore, adm: Admission, size: int, seed_links: int) -> list[str]:
    """A farm of ``size`` hosts, all linking to each other, each linked from the first
    ``seed_links`` seed hosts; the farm hosts' own links carry their trust."""
    seeds = [f"s{i}.test" for i in range(seed_links)]
    await lease_seeds(store, adm, seeds)
    hosts = [f"f{i}.test" for i in range(size)]
    for s in seeds:
        await adm.admit(links(s, hosts))
    trust = {h: await trust_of(store, h) for h in hosts}  # as their leases would carry it
    for h in hosts:
        await adm.admit(links(h, [o for o in hosts if o != h], page=f"from-{h}", trust=trust[h]))
    return hosts


async def test_a_farm_with_few_trusted_links_in_is_a_suspect(make_store: StoreFactory) -> None:
    # Wu & Davison 2005: five hosts that all link to each other: each has 4 hosts that both
    # link to it and are linked from it. One seed host links to each: trust 0.0425 (below
    # the 0.25 threshold) and one trusted linking host it does not link back to. 4 > 3 x 1:
    # a suspect, and not endorsed (1 < 4). Its trust: 0.0425 from the seed; the farm hosts
    # (0.0425, below the 0.05 vouch threshold) hand on nothing.
    store = spam_store(make_store)
    adm = admission(store)
    hosts = await farm(store, adm, size=5, seed_links=1)
    for h in hosts:
        info = await store.host_info(h)
        assert info["suspect"] == "1" and int(info["recip"]) == 4
        assert float(info["pf"]) == pytest.approx(store.settings.priority.suspect_penalty)
        assert float(info["trust"]) == pytest.approx(SEED_SHARE) and "endorsed" not in info


async def test_an_honest_cluster_linked_from_trusted_hosts_is_not_a_suspect(
        make_store: StoreFactory) -> None:
    # The same five interlinked hosts (a university's departments), each linked from
    # two seed hosts: 4 reciprocal hosts, 2 trusted one-way linking hosts; 4 <= 3 x 2, so
    # dense linking alone does not make a suspect.
    store = spam_store(make_store)
    adm = admission(store)
    hosts = await farm(store, adm, size=5, seed_links=2)
    for h in hosts:
        info = await store.host_info(h)
        assert "suspect" not in info and int(info["recip"]) == 4

async def test_a_cluster_linked_from_six_seed_hosts_is_trusted(make_store: StoreFactory) -> None:
    # With six seed hosts linking to each, the trust is 6 x 0.0425 = 0.255 >= 0.25:
    # trusted, priority factor 1, no gap between fetches.
    store = spam_store(make_store, endorse_hosts=0)
    hosts = await farm(store, admission(store), size=5, seed_links=6)
    for h in hosts:
        info = await store.host_info(h)
        assert "suspect" not in info and float(info["pf"]) == 1.0
        assert float(info["trust"]) >= 6 * SEED_SHARE - 1e-9


async def test_suspects_lease_last_and_seldom(make_store: StoreFactory, clock: Clock) -> None:
    # The defence's effect on the lease order: a suspect's URL waits behind an honest URL
    # with less cash (priority x 0.001), and after one fetch it is held back for
    # suspect_delay_s (IRLbot's budget enforcement slows spam hosts rather than drop them).
    store = spam_store(make_store, suspect_delay_s=30.0)
    adm = admission(store)
    hosts = await farm(store, adm, size=5, seed_links=1)
    await adm.admit([Candidate("http://s0.test/next", depth=1, cash=0.001, source_host="s0.test")])
    order = []
    while True:
        got = await store.lease(1)
        if not got:
            break
        order.append(got[0].host)
        await store.complete(Completion(got[0], Outcome.FETCHED))
    assert order[0] == "s0.test" and set(order[1:]) == set(hosts) and len(order) == 6
    clock.advance(29.0)
    assert await store.lease(10) == []  # each suspect held back for 30 s
    clock.advance(2.0)
    again = await store.lease(10)
    assert {lease.host for lease in again} == set(hosts)
    assert all(lease.suspect and lease.passes_trust == 0.0 for lease in again)


async def test_old_lease_members_are_still_read(make_store: StoreFactory, clock: Clock) -> None:
    # A lease stored before the trust field ('id\nhost\nscore\nattempts\nurl') is reaped
    # and requeued with its own URL.
    store = spam_store(make_store)
    adm = admission(store)
    await adm.admit([Candidate("http://old.test/a", depth=0)])
    (lease,) = await store.lease(1)
    pk = store.keys.part_for("old.test")
    old = "\n".join([lease.id, lease.host, str(lease.score), "0", lease.url])
    assert Lease.from_member(old, 1).url == lease.url and Lease.from_member(old, 1).trust is None
    await store.redis.zrem(pk.leases, lease.member)
    await store.redis.zadd(pk.leases, {old: clock.ms - 1})
    assert await store.reap() == {"requeued": 1}
    (again,) = await store.lease(1)
    assert again.url == "http://old.test/a"


async def test_operator_marks_overrule_the_signals(make_store: StoreFactory) -> None:
    store = spam_store(make_store)
    adm = admission(store)
    hosts = await farm(store, adm, size=5, seed_links=1)
    settings = store.settings
    state = await store.control("f0.test", "trust")
    info = await store.host_info("f0.test")
    assert state == "active" and info["mark"] == "trusted" and "suspect" not in info
    assert float(info["trust"]) == 1.0 and float(info["pf"]) == 1.0
    await adm.admit(links("f1.test", ["f0.test"], page="more", trust=0.0))  # no change now
    assert (await store.host_info("f0.test"))["mark"] == "trusted"
    await store.control("s0.test", "untrust")
    info = await store.host_info("s0.test")
    assert info["suspect"] == "1" and float(info["trust"]) == 0.0
    assert hosts and "f0.test" in {r["host"] for r in await store.controlled_hosts()}
    assert host_command(settings, "F0.test", "trust").action == "trust"
    with pytest.raises(ConfigError, match="takes no value"):
        host_command(settings, "f0.test", "untrust", "1")


async def test_explain_shows_the_spam_signals(make_store: StoreFactory) -> None:
    store = spam_store(make_store)
    adm = admission(store)
    await farm(store, adm, size=5, seed_links=1)
    info = await explain(store, "http://f2.test/p")
    spam = info["spam"]
    assert spam["suspect"] and spam["reciprocal_hosts"] == 4
    assert spam["trusted_one_way_linking_hosts"] == 1 and spam["trusted_linking_hosts"] == 1
    assert spam["trust"] == pytest.approx(SEED_SHARE) and not spam["endorsed"]
    assert spam["trust_source"].endswith("from s0.test")
    assert info["host_fields"]["budget"]["earned"] == store.settings.priority.host_budget_base
    text = format_explain(info)
    assert "a link-spam suspect" in text and "4 reciprocal hosts" in text


async def test_a_new_host_without_trusted_links_waits_its_probation(
        make_store: StoreFactory, clock: Clock) -> None:
    # Probation (our rule, values tuned on the adversarial webs, no source): a host found
    # through links, never fetched, waits probation_s for its first fetch until its trust
    # reaches the vouch threshold (0.05) or 3 distinct trusted hosts (trust >= 0.05) link to
    # it, or its trust reaches what one link from a seed-level host gives (0.0425). TrustRank
    # shares as above: 0.85 x 0.1 / 20 = 0.00425 from a host of trust 0.1.
    store = spam_store(make_store, probation_s=30.0, probation_linking_hosts=3)
    adm = admission(store)
    await adm.admit(links("low.test", ["far.test", "cluster.test"], trust=0.04))
    # one link from a seed-level host (0.85 x 1 / 20 = 0.0425) ends a probation at once
    await adm.admit(links("s.test", ["near.test"], trust=1.0))
    got = await store.lease(10)
    assert [lease.host for lease in got] == ["near.test"]
    await store.complete_many([Completion(lease, Outcome.FETCHED) for lease in got])
    await adm.admit(links("mid1.test", ["cluster.test"], trust=0.1)
                    + links("mid2.test", ["cluster.test"], trust=0.1))
    assert await store.lease(10) == []  # two trusted hosts, 0.0085 of trust: still waiting
    await adm.admit(links("mid3.test", ["cluster.test"], trust=0.1))
    assert await trust_of(store, "cluster.test") == pytest.approx(3 * 0.00425)
    got = await store.lease(10)  # the third trusted host ends the probation: due now
    assert [lease.host for lease in got] == ["cluster.test"]
    clock.advance(29.0)
    assert await store.lease(10) == []  # far.test: found 29 s ago, no trusted host linked
    clock.advance(2.0)
    assert [lease.host for lease in await store.lease(10)] == ["far.test"]


async def test_no_probation_when_turned_off_or_for_seeds(make_store: StoreFactory) -> None:
    # probation_s = 0 leases a new host at once; a seed's host is never on probation.
    store = spam_store(make_store, probation_s=0.0)
    adm = admission(store)
    await adm.admit(links("low.test", ["far.test"], trust=0.04))
    assert [lease.host for lease in await store.lease(10)] == ["far.test"]
    held = spam_store(make_store, probation_s=30.0)
    adm2 = admission(held)
    await adm2.admit(links("low.test", ["later.test"], trust=0.04))
    await adm2.admit([Candidate("http://later.test/", depth=0)])  # now a seed's host
    assert "later.test" in {lease.host for lease in await held.lease(10)}


async def test_redirects_and_links_within_a_domain_hand_on_no_trust(
        make_store: StoreFactory) -> None:
    # TrustRank passes trust along links between independent hosts. Our rule (no source):
    # a redirect into another registrable domain (a doorway) hands on nothing, one within
    # the domain hands on the usual share (0.85 x 1 / 10); a link between two hosts of one
    # registrable domain (under .test: the last two labels, RFC 6761) hands on nothing and
    # counts as an untrusted linking host.
    store = spam_store(make_store)
    adm = admission(store)
    await adm.admit([
        Candidate("http://farm.test/", depth=1, cash=0.01, source_host="s.test",
                  source_trust=1.0, hops=1),
        Candidate("http://www.s.test/", depth=1, cash=0.01, source_host="s.test",
                  source_trust=1.0, hops=1),
        Candidate("http://b.spam.test/", depth=1, cash=0.01, source_host="a.spam.test",
                  source_trust=1.0),
    ])
    assert await trust_of(store, "farm.test") == 0.0
    assert await trust_of(store, "www.s.test") == pytest.approx(SEED_SHARE)
    assert await trust_of(store, "b.spam.test") == 0.0
    pk = store.keys.part(partition_of("b.spam.test", store.partitions))
    assert await store.redis.pfcount(pk.linking_hosts("b.spam.test")) == 1
    assert await store.redis.pfcount(pk.trusted_hosts("b.spam.test")) == 0
    # a plain link between the same two hosts in the same batch still hands trust on
    await adm.admit([
        Candidate("http://door.test/", depth=1, cash=0.01, source_host="t.test",
                  source_trust=1.0, hops=1),
        Candidate("http://door.test/page", depth=1, cash=0.01, source_host="t.test",
                  source_trust=1.0),
    ])
    assert await trust_of(store, "door.test") == pytest.approx(SEED_SHARE)


async def test_hosts_of_one_domain_linking_each_other_are_not_reciprocal(
        make_store: StoreFactory) -> None:
    # Wu & Davison 2005 count the *domains* a page's in-links come from and its out-links
    # go to. Five departments of one registrable domain (uni.test) that all link to each
    # other, each linked from one seed host: no reciprocal domain, so no suspect (the same
    # shape over five separate domains is one: test_a_farm_with_few_trusted_links_in_is_a_suspect).
    # Links within the domain hand on no trust: each holds the seed's 0.085 only.
    store = spam_store(make_store)
    adm = admission(store)
    await lease_seeds(store, adm, ["s0.test"])
    hosts = [f"dept{i}.uni.test" for i in range(5)]
    await adm.admit(links("s0.test", hosts))
    for h in hosts:
        await adm.admit(links(h, [o for o in hosts if o != h], page=f"from-{h}",
                              trust=SEED_SHARE))
    for h in hosts:
        info = await store.host_info(h)
        assert "suspect" not in info and info.get("recip", "0") == "0"
        assert float(info["trust"]) == pytest.approx(SEED_SHARE)


async def test_a_host_held_back_is_due_as_soon_as_its_standing_rises(
        make_store: StoreFactory, clock: Clock) -> None:
    # The untrusted gap counts from the last lease by the host's standing *now*. x.test is
    # linked from one seed-level host: 0.85 x 1 / 20 = 0.0425 of trust (TrustRank shares,
    # Gyöngyi et al. 2004), which ends its probation but leaves it untrusted, so after one
    # fetch it is held back for untrusted_delay_s. Five more seed-level hosts link to it:
    # 6 x 0.0425 = 0.255 >= 0.25, trusted, no gap: it is leased at once, not 5 s after its
    # last lease.
    store = spam_store(make_store, untrusted_delay_s=5.0, endorse_hosts=0)
    adm = admission(store)
    await adm.admit(links("s0.test", ["x.test"], trust=1.0))
    (first,) = await store.lease(10)
    await store.complete(Completion(first, Outcome.FETCHED))
    await adm.admit(links("s0.test", ["x.test"], page="more", trust=1.0))
    assert await store.lease(10) == []  # untrusted: held back for 5 s
    for i in range(1, 6):
        await adm.admit(links(f"s{i}.test", ["x.test"], trust=1.0))
    assert await trust_of(store, "x.test") == pytest.approx(6 * SEED_SHARE)
    clock.advance(0.5)
    assert [lease.host for lease in await store.lease(10)] == ["x.test"]


async def test_trusted_one_way_linking_hosts_endorse_an_untrusted_host(
        make_store: StoreFactory, clock: Clock) -> None:
    # Endorsement: IRLbot's in-degree from other domains (Lee et al. 2008), counted over
    # trusted linking hosts (trust >= 0.05) that x.test does not link back to (one-way, the
    # complement of Wu & Davison's reciprocal links), at least endorse_hosts = 4. Hand-worked:
    # b1..b3 (trust 0.5) each hand on 0.85 x 0.5 / 20 = 0.02125; weak.test (0.04) nothing and
    # counts as untrusted. x.test links to b1: one-way trusted hosts = |{b1,b2,b3}| - |{b1}|
    # = 2, trust 0.06375 < 0.25: untrusted, pf 0.06375 / 0.25 = 0.255. b4 and b5 make it 4:
    # endorsed, pf 1, paced as a trusted host.
    store = spam_store(make_store, untrusted_delay_s=5.0, probation_s=0.0, endorse_hosts=4)
    adm = admission(store)
    for b in ("b1", "b2", "b3"):
        await adm.admit(links(f"{b}.test", ["x.test"], trust=0.5))
    await adm.admit(links("weak.test", ["x.test"], trust=0.04))
    (first,) = await store.lease(10)
    assert first.host == "x.test"
    await adm.admit(links("x.test", ["b1.test"], page="out", trust=0.06375)
                    + [Candidate("http://x.test/next", depth=2, cash=0.01, source_host="x.test",
                                 source_trust=0.06375)])
    await store.complete(Completion(first, Outcome.FETCHED))
    info = await store.host_info("x.test")
    assert float(info["trust"]) == pytest.approx(3 * 0.02125)
    assert float(info["pf"]) == pytest.approx(0.255) and "endorsed" not in info
    assert [lease.host for lease in await store.lease(10)] == ["b1.test"]  # x.test waits 5 s
    for b in ("b4", "b5"):
        await adm.admit(links(f"{b}.test", ["x.test"], trust=0.5))
    info = await store.host_info("x.test")
    assert info["endorsed"] == "4" and float(info["pf"]) == 1.0 and "suspect" not in info
    assert float(info["trust"]) == pytest.approx(5 * 0.02125)  # trust itself is unchanged
    explained = (await explain(store, "http://x.test/next"))["spam"]
    assert explained["endorsed"] and explained["lease_gap_s"] == 0.0
    assert [lease.host for lease in await store.lease(10)] == ["x.test"]  # no gap now
    # linking back to its endorsers later (an honest site links to the big sites that link
    # to it) leaves 5 reciprocal hosts and none one-way: it stays endorsed, not a suspect
    await adm.admit(links("x.test", ["b2.test", "b3.test", "b4.test", "b5.test"], page="back",
                          trust=5 * 0.02125))
    info = await store.host_info("x.test")
    assert float(info["pf"]) == 1.0 and "suspect" not in info


async def test_an_endorsement_before_a_host_shows_its_links_is_not_kept(
        make_store: StoreFactory) -> None:
    # Before y.test's pages are fetched its out-linked hosts are unknown, so every trusted
    # linking host counts as one-way: 4 of them (trust 0.5) endorse it for now (pf 1). Its
    # pages then link back to all four (Wu & Davison's reciprocal links): 4 reciprocal
    # hosts > 3 x 0 one-way hosts, a suspect. Trust 4 x 0.02125 = 0.085 < 0.25.
    store = spam_store(make_store, probation_s=0.0, endorse_hosts=4)
    adm = admission(store)
    backers = [f"f{i}.test" for i in range(4)]
    for b in backers:
        await adm.admit(links(b, ["y.test"], trust=0.5))
    info = await store.host_info("y.test")
    assert float(info["pf"]) == 1.0 and "endorsed" not in info
    await adm.admit(links("y.test", backers, page="back", trust=0.085))
    info = await store.host_info("y.test")
    assert info["suspect"] == "1" and int(info["recip"]) == 4
    assert float(info["pf"]) == pytest.approx(store.settings.priority.suspect_penalty)
