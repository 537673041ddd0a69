-- admit: add a batch of URLs of one partition to the frontier.
-- KEYS[1] counts   KEYS[2] reasons   KEYS[3] due   KEYS[4] ready   KEYS[5] prio
-- KEYS[6] touched   KEYS[7] hosts
-- KEYS[8 ..]       per host group g (0-based): host hash, hot ZSET, cold LIST,
--                  linking-hosts HyperLogLog, out-hosts HLL, trusted-linking-hosts HLL (6 keys)
-- then             per link-only host: host hash, linking-hosts, out-hosts, trusted HLLs (4 keys)
-- then             per source host: host hash, hot ZSET, cold LIST, linking-hosts, out-hosts,
--                  trusted HLLs (6 keys)
-- then             the URL-seen buckets this batch touches
-- KEYS[#KEYS]      the ended journal (URLs excluded here)
-- ARGV[1] now (ms)  ARGV[2] hot capacity  ARGV[3] number of host groups  ARGV[4] excluded count
-- ARGV[5] budget base  ARGV[6] budget per trusted linking host  ARGV[7] number of link-only
-- hosts  ARGV[8] number of source hosts  ARGV[9] budget per untrusted linking host
-- ARGV[10] trust threshold  ARGV[11] reciprocal hosts that make a suspect
-- ARGV[12] suspect penalty (priority factor)  ARGV[13] reciprocal ratio
-- ARGV[14] trusted linking hosts that end a new host's probation  ARGV[15] trust that ends it
-- ARGV[16] trusted one-way linking hosts that endorse an untrusted host (0: none do)
-- ARGV[17] gap between fetches of a suspect (ms)  ARGV[18] of an untrusted host (ms)
-- ARGV[19] probation of a new host (ms)
-- then per source host (whose fetched pages link out in this batch): host, k, k linked hosts
-- then per group:  host, absolute budget (0: none), seeded (1: a seed of this host is in
--                  the batch), m, m times (linking host, trust share, trusted 1|0), n,
--                  and n times: seen slot, fingerprint, score, credit, url
-- then per link-only host (only links to pages fetched already): host, m, m (host, share,
--                  trusted)
-- then per excluded URL: seen slot, fingerprint, reason, url
-- (a seen slot is a 1-based index into the seen-bucket part of KEYS)
-- A new URL is queued on its host (or excluded: host blocked, host budget spent); a URL
-- seen before that still waits in its host's hot window gains `credit` (OPIC cash).
-- Budgets (Lee, Leonard, Wang & Loguinov, WWW 2008), weighted by the linking hosts'
-- reputation: a host may hold base + per x (distinct trusted linking hosts) + per_untrusted
-- x (the other linking hosts) URLs, and never more than its absolute budget; a link-spam
-- suspect earns nothing beyond base. A host that had a seed is vouched for by the
-- operator: only the absolute budget applies. A URL beyond the earned budget is excluded
-- ('host_link_budget') but not remembered as seen, so it may be admitted when offered
-- again after more hosts link to its host.
-- Link spam (docs/priority.md): a host's 'trust' is host-level TrustRank (Gyongyi,
-- Garcia-Molina & Pedersen, VLDB 2004) computed online: a seed's host holds 1; each
-- distinct linking host adds the share its lease gave (damping x its trust / its out-linked
-- hosts, worked out by admission), once, up to 1. A host below the trust threshold that
-- has at least `reciprocal` hosts both linking to it and linked from it (Wu & Davison,
-- WWW 2005), more than `ratio` times its trusted one-way linkers, is a 'suspect'. The operator's mark ('trusted' / 'untrusted') overrules both.
-- Endorsement (in-degree from other domains, as IRLbot ranks domains, Lee, Leonard, Wang &
-- Loguinov, WWW 2008; counted over trusted hosts and one-way links only, so that a farm's
-- exchanged links count nothing, Wu & Davison 2005): an untrusted host, not a suspect,
-- that at least `endorse` trusted hosts link to without being linked back is *endorsed*:
-- ranked and paced as a trusted host (its trust still hands on only what it holds). The
-- endorsement of a host whose own links are known stays ('endorsed' = the count then): an
-- honest site's later links back to the big sites that link to it lower the count, and
-- must not make it a suspect. (Before its pages are fetched every trusted linking host
-- counts as one-way, so that count alone is not kept.)
-- 'pf', the host's priority factor: 1 when trusted or endorsed, trust / threshold when
-- untrusted (at least the penalty), the penalty for a suspect.
-- A host whose standing rises (a suspect no more, untrusted to trusted or endorsed) while
-- lease_take holds it back in due by its former standing is made due at the time its new
-- standing allows (never later than it was).
-- Probation: a host first found through links of hosts of known trust, never fetched, is on
-- probation from then ('probe' = the time) until its trust reaches `probation_trust` or
-- `probation` distinct trusted hosts link to it; lease_take.lua holds its first fetch
-- back meanwhile (a farm's hosts are linked by few trusted hosts and wait; an honest
-- host's trusted in-links keep coming).
-- A mirror host (mirror.lua set 'mlim') may hold no more than 'mlim' URLs: beyond, a URL
-- is excluded as 'mirror_host', not remembered as seen (the limit grows with new pages).
-- Returns {new, credited, excluded, duplicates}.
local now = tonumber(ARGV[1])
local cap = tonumber(ARGV[2])
local ngroups = tonumber(ARGV[3])
local nexcl = tonumber(ARGV[4])
local base, per = tonumber(ARGV[5]), tonumber(ARGV[6])
local nlinked = tonumber(ARGV[7])
local nsources = tonumber(ARGV[8])
local per_weak, threshold = tonumber(ARGV[9]), tonumber(ARGV[10])
local reciprocal, penalty, ratio = tonumber(ARGV[11]), ARGV[12], tonumber(ARGV[13])
local probation, probation_trust = tonumber(ARGV[14]), tonumber(ARGV[15])
local endorse = tonumber(ARGV[16])
local suspect_gap, untrusted_gap, probation_ms = tonumber(ARGV[17]), tonumber(ARGV[18]),
                                                 tonumber(ARGV[19])
local linked_base = 7 + 6 * ngroups
local sources_base = linked_base + 4 * nlinked
local seen_base = sources_base + 6 * nsources
local S = {due = KEYS[3], ready = KEYS[4], prio = KEYS[5], touched = KEYS[6]}
local ended = KEYS[#KEYS]
local new, credited, excluded, dups = 0, 0, 0, 0
local a = 20
local reasons = {}
local journaled = {}  -- 'excluded reason url' lines for the ended journal

local function exclude(reason, url)
  excluded = excluded + 1
  reasons[reason] = (reasons[reason] or 0) + 1
  journaled[#journaled + 1] = 'excluded ' .. reason .. ' ' .. url
end

-- The URLs this host may hold now, and whether that limit is earned (may still grow).
-- `wanted`: the most URLs the host can hold after this batch (no count needed below base).
local function host_limit(budget, linking, trusted, wanted, seeded, suspect)
  if base == 0 or seeded or wanted <= base then
    return budget, false
  end
  local earned = base
  if not suspect and (per > 0 or per_weak > 0) then
    local all = redis.call('PFCOUNT', linking)
    local good = math.min(all, redis.call('PFCOUNT', trusted))
    earned = base + per * good + per_weak * (all - good)
  end
  if budget > 0 and budget <= earned then
    return budget, false
  end
  return earned, true
end

-- Record m linking hosts (ARGV[from ..]: host, trust share, trusted '1' | '0' | '-' for a
-- host whose trust is not known) of host hash `hk`: each new one (the HyperLogLog changed)
-- adds its share to the host's trust, once; a trusted one (or one of unknown trust, as
-- before trust was tracked) joins the trusted-linking-hosts count. A host starts tracking
-- trust (at 0) when a host of known trust links to it.
local function add_linking(host, hk, linking, trusted, from, m)
  local gain, best, best_from, known = 0, 0, nil, false
  local good = {}
  for i = from, from + 3 * (m - 1), 3 do
    local source, share, flag = ARGV[i], tonumber(ARGV[i + 1]), ARGV[i + 2]
    if redis.call('PFADD', linking, source) == 1 and share > 0 then
      gain = gain + share
      if share > best then
        best, best_from = share, source
      end
    end
    if flag ~= '0' then
      good[#good + 1] = source
    end
    known = known or flag ~= '-'
  end
  local vouched = #good > 0 and redis.call('PFADD', trusted, unpack(good)) == 1
  if not hk or not known then
    return
  end
  local f = redis.call('HMGET', hk, 'trust', 'state', 'seeded', 'mark', 'tbest', 'probe',
                       'fetched', 'lease', 'next')
  if not f[2] or f[3] or f[4] then  -- unknown host, a seed's or marked by the operator
    return
  end
  local t = tonumber(f[1] or '0')
  local fields = {}
  local probe = f[6]
  if not f[1] and not f[7] and not leased(f[8]) then  -- first found now, never fetched: probation
    probe = tostring(now)
  end
  if gain > 0 and t < 1 then
    t = math.min(1, t + gain)
    fields[#fields + 1], fields[#fields + 2] = 'trust', tostring(t)
    if best > tonumber(f[5] or '0') then
      fields[#fields + 1], fields[#fields + 2] = 'tbest', tostring(best)
      fields[#fields + 1], fields[#fields + 2] = 'tfrom', best_from
    end
  elseif not f[1] then
    fields[#fields + 1], fields[#fields + 2] = 'trust', '0'
  end
  if probe and (t >= probation_trust or (vouched and redis.call('PFCOUNT', trusted) >= probation)) then
    if f[6] then  -- vouched for: a host held back for its probation is due now
      redis.call('HDEL', hk, 'probe')
      redis.call('ZADD', S.due, 'XX', math.max(now, tonumber(f[9] or '0')), host)
    end
  elseif probe and not f[6] then
    fields[#fields + 1], fields[#fields + 2] = 'probe', probe
  end
  if #fields > 0 then
    redis.call('HSET', hk, unpack(fields))
  end
end

-- The gap lease_take keeps between fetches of a host of this standing (ms).
local function standing_gap(suspect, pf)
  if suspect then
    return suspect_gap
  elseif pf and pf ~= '1' then
    return untrusted_gap
  end
  return 0
end

-- Decide whether a host is a link-spam suspect or endorsed and set its priority factor
-- 'pf'; returns true if 'pf' changed. Hosts never linked (no 'trust' field) keep no
-- factor. A suspect: untrusted, at least `reciprocal` hosts both link to it and are linked
-- from it (R), and those exchanges outnumber `ratio` times its trusted one-way linkers
-- (trusted linking hosts it does not link back to: |trusted U out| - |out|). Endorsed: an
-- untrusted host, not a suspect, with at least `endorse` trusted one-way linkers.
local function assess(host, hk, linking, out, trusted)
  local f = redis.call('HMGET', hk, 'trust', 'seeded', 'mark', 'pf', 'state', 'suspect',
                       'tlease', 'next', 'probe', 'endorsed')
  if not f[1] or not f[5] then
    return false
  end
  local t = tonumber(f[1])
  local suspect, recip, outs, oneway = false, nil, nil, nil
  local untrusted = f[3] ~= 'trusted' and not f[2] and t < threshold
  if f[3] == 'untrusted' then
    suspect = true
  elseif untrusted and not f[10] then
    local ins = redis.call('PFCOUNT', linking)
    if ins >= reciprocal then
      outs = redis.call('PFCOUNT', out)
      if outs >= reciprocal then
        recip = ins + outs - redis.call('PFCOUNT', linking, out)
        if recip >= reciprocal then
          oneway = redis.call('PFCOUNT', trusted, out) - outs
          suspect = recip > ratio * oneway
        end
      end
    end
  end
  local endorsed = f[10] and f[3] ~= 'untrusted' or false
  if untrusted and not suspect and not endorsed and endorse > 0 then
    if oneway == nil and redis.call('PFCOUNT', trusted) >= endorse then
      outs = outs or redis.call('PFCOUNT', out)
      oneway = redis.call('PFCOUNT', trusted, out) - outs
    end
    endorsed = oneway ~= nil and oneway >= endorse
  end
  local pf
  if suspect then
    pf = penalty
  elseif not untrusted or endorsed then
    pf = '1'
  else
    pf = tostring(math.max(tonumber(penalty), t / threshold))
  end
  local fields = {'pf', pf}
  if recip then
    table.insert(fields, 'recip')
    table.insert(fields, recip)
  end
  if endorsed and not f[10] and outs > 0 then  -- kept once its own links are known
    table.insert(fields, 'endorsed')
    table.insert(fields, oneway)
  end
  redis.call('HSET', hk, unpack(fields))
  if suspect then
    redis.call('HSET', hk, 'suspect', '1')
  else
    redis.call('HDEL', hk, 'suspect')
  end
  local gap = standing_gap(suspect, pf)
  if f[7] and gap < standing_gap(f[6], f[4]) then  -- held back by its former standing?
    local allowed = tonumber(f[7]) + gap
    if f[9] and gap > 0 then  -- still on probation
      allowed = math.max(allowed, tonumber(f[9]) + probation_ms)
    end
    redis.call('ZADD', S.due, 'XX', 'LT', math.max(now, tonumber(f[8] or '0'), allowed), host)
  end
  return pf ~= f[4]
end

-- Source hosts: their pages link to these hosts (the out-hosts side of reciprocity).
for s = 0, nsources - 1 do
  local host, k = ARGV[a], tonumber(ARGV[a + 1])
  a = a + 1
  local k0 = sources_base + 6 * s
  local hk, hot, cold = KEYS[k0 + 1], KEYS[k0 + 2], KEYS[k0 + 3]
  local linking, out, trusted = KEYS[k0 + 4], KEYS[k0 + 5], KEYS[k0 + 6]
  local changed = 0
  for i = a + 1, a + k, 1000 do
    changed = changed + redis.call('PFADD', out, unpack(ARGV, i, math.min(i + 999, a + k)))
  end
  a = a + 1 + k
  if changed > 0 and assess(host, hk, linking, out, trusted) then
    schedule(S, host, hk, hot, cold, cap, now)  -- its priority factor changed
  end
end

for g = 0, ngroups - 1 do
  local host, budget, seed, m = ARGV[a], tonumber(ARGV[a + 1]), ARGV[a + 2], tonumber(ARGV[a + 3])
  a = a + 4
  local k0 = 7 + 6 * g
  local hk, hot, cold = KEYS[k0 + 1], KEYS[k0 + 2], KEYS[k0 + 3]
  local linking, out, trusted = KEYS[k0 + 4], KEYS[k0 + 5], KEYS[k0 + 6]
  local f = redis.call('HMGET', hk, 'state', 'admitted', 'seeded', 'suspect', 'mlim', 'lease')
  local state, admitted, seeded, suspect = f[1], tonumber(f[2] or '0'), f[3], f[4]
  if not state then
    state = 'active'
    redis.call('HSET', hk, 'state', state, 'boost', '1')
    redis.call('SADD', KEYS[7], host)
  end
  if seed == '1' and not seeded then
    seeded = '1'
    redis.call('HSET', hk, 'seeded', seeded, 'trust', '1', 'tfrom', 'seed', 'pf', '1')
    redis.call('HDEL', hk, 'suspect', 'probe')
    suspect = nil
    if leased(f[6]) then  -- its standing changed while leased
      touch(S, host)
    end
  end
  local reschedule = false  -- the host's best score (or its factor) may have changed, or it was idle
  if m > 0 then
    add_linking(host, hk, linking, trusted, a, m)
    if assess(host, hk, linking, out, trusted) then
      reschedule = true
    end
    suspect = redis.call('HGET', hk, 'suspect')
  end
  a = a + 3 * m
  local n = tonumber(ARGV[a])
  a = a + 1
  local limit, earned = host_limit(budget, linking, trusted, admitted + n, seeded, suspect)
  local cut = earned and 'host_link_budget' or 'host_budget'
  if f[5] and (limit == 0 or tonumber(f[5]) < limit) then  -- a mirror host (mirror.lua)
    limit, earned, cut = math.max(1, tonumber(f[5])), true, 'mirror_host'
  end
  local changed = false  -- something was queued or credited: the host's counters change
  local q = nil
  local prior_best = nil  -- best score before this batch (nil: the host queued nothing)
  for _ = 1, n do
    local slot, fp, score, credit, url = ARGV[a], ARGV[a + 1], ARGV[a + 2], ARGV[a + 3], ARGV[a + 4]
    a = a + 5
    local full = limit > 0 and admitted >= limit
    local fresh
    if full and earned and state ~= 'blocked' then
      fresh = redis.call('SISMEMBER', KEYS[seen_base + tonumber(slot)], fp) == 0
    else
      fresh = redis.call('SADD', KEYS[seen_base + tonumber(slot)], fp) == 1
    end
    if fresh then
      if state == 'blocked' then
        exclude('host_blocked', url)
      elseif full then
        exclude(cut, url)
      else
        if not q then
          q = queue_open(hot, cold, cap)
          if q.size > 0 then
            local _, best = best_url(hot, cold, cap)
            prior_best = tonumber(best)
          end
        end
        if prior_best == nil or tonumber(score) > prior_best then
          reschedule = true
        end
        queue_push(q, url, score)
        admitted = admitted + 1
        new = new + 1
        changed = true
      end
    else
      dups = dups + 1
      if credit ~= '0' and redis.call('ZSCORE', hot, url) then
        redis.call('ZINCRBY', hot, credit, url)
        if q then
          q.low = nil
        end
        credited = credited + 1
        changed = true
        reschedule = true
      end
    end
  end
  if q then
    queue_close(q)
  end
  if changed then
    redis.call('HSET', hk, 'admitted', admitted)
  end
  if reschedule then  -- a host that already queued URLs is scheduled (or held) already
    schedule(S, host, hk, hot, cold, cap, now)
  end
end

for l = 0, nlinked - 1 do
  local host, m = ARGV[a], tonumber(ARGV[a + 1])
  a = a + 1
  local k0 = linked_base + 4 * l
  local hk = KEYS[k0 + 1]
  if redis.call('EXISTS', hk) == 0 then
    hk = nil
  end
  add_linking(host, hk, KEYS[k0 + 2], KEYS[k0 + 4], a + 1, m)
  if hk and assess(host, hk, KEYS[k0 + 2], KEYS[k0 + 3], KEYS[k0 + 4])
      and leased(redis.call('HGET', hk, 'lease')) then
    touch(S, host)  -- its priority factor changed while leased
  end
  a = a + 1 + 3 * m
end

for _ = 1, nexcl do
  local slot, fp, reason, url = ARGV[a], ARGV[a + 1], ARGV[a + 2], ARGV[a + 3]
  a = a + 4
  if redis.call('SADD', KEYS[seen_base + tonumber(slot)], fp) == 1 then
    exclude(reason, url)
  else
    dups = dups + 1
  end
end

if new + excluded > 0 then
  redis.call('HINCRBY', KEYS[1], 'admitted', new + excluded)
end
if new > 0 then
  redis.call('HINCRBY', KEYS[1], 'queued', new)
end
if excluded > 0 then
  redis.call('HINCRBY', KEYS[1], 'excluded', excluded)
  for reason, count in pairs(reasons) do
    redis.call('HINCRBY', KEYS[2], 'excluded:' .. reason, count)
  end
  each_chunk(journaled, 1000, function(...) redis.call('RPUSH', ended, ...) end)
end
return {new, credited, excluded, dups}
