-- admit: add a batch of URLs of one partition to the frontier.
-- KEYS[1] counts   KEYS[2] reasons   KEYS[3] due   KEYS[4] ready   KEYS[5] prio
-- KEYS[6] claims   KEYS[7] hosts
-- KEYS[8 ..]       per host group g (0-based): host hash, hot ZSET, cold LIST,
--                  linking-hosts HyperLogLog (4 keys)
-- then             per link-only host: its linking-hosts HyperLogLog (1 key)
-- then             the URL-seen buckets this batch touches
-- KEYS[#KEYS]      the ended journal (URLs excluded here)
-- ARGV[1] now (ms)  ARGV[2] hot capacity  ARGV[3] number of host groups  ARGV[4] excluded count
-- ARGV[5] budget base  ARGV[6] budget per linking host  ARGV[7] number of link-only hosts
-- then per group:  host, absolute budget (0: none), seeded (1: a seed of this host is in
--                  the batch), m, m linking hosts (other hosts whose pages link here), n,
--                  and n times: seen slot, fingerprint, score, credit, url
-- then per link-only host (only links to pages fetched already): m, m linking hosts
-- then per excluded URL: seen slot, fingerprint, reason, url
-- (a seen slot is a 1-based index into the seen-bucket part of KEYS)
-- A new URL is queued on its host (or excluded: host blocked, host budget spent); a URL
-- seen before that still waits in its host's hot window gains `credit` (OPIC cash).
-- Budgets (Lee, Leonard, Wang & Loguinov, WWW 2008): a host may hold
-- base + per x (distinct linking hosts) URLs, and never more than its absolute budget.
-- A host that had a seed is vouched for by the operator: only the absolute budget applies.
-- A URL beyond the earned budget is excluded ('host_link_budget') but not remembered as
-- seen, so it may be admitted when offered again after more hosts link to its host.
-- Returns {new, credited, excluded, duplicates}.
local now = tonumber(ARGV[1])
local cap = tonumber(ARGV[2])
local ngroups = tonumber(ARGV[3])
local nexcl = tonumber(ARGV[4])
local base, per = tonumber(ARGV[5]), tonumber(ARGV[6])
local nlinked = tonumber(ARGV[7])
local seen_base = 7 + 4 * ngroups + nlinked
local S = {due = KEYS[3], ready = KEYS[4], prio = KEYS[5], claims = KEYS[6]}
local ended = KEYS[#KEYS]
local new, credited, excluded, dups = 0, 0, 0, 0
local reasons = {}
local journaled = {}  -- 'excluded reason url' lines for the ended journal

local function exclude(reason, url)
  excluded = excluded + 1
  reasons[reason] = (reasons[reason] or 0) + 1
  journaled[#journaled + 1] = 'excluded ' .. reason .. ' ' .. url
end

-- The URLs this host may hold now, and whether that limit is earned (may still grow).
-- `wanted`: the most URLs the host can hold after this batch (no count needed below base).
local function host_limit(budget, linking, wanted, seeded)
  if base == 0 or seeded or wanted <= base then
    return budget, false
  end
  local earned = base
  if per > 0 then
    earned = base + per * redis.call('PFCOUNT', linking)
  end
  if budget > 0 and budget <= earned then
    return budget, false
  end
  return earned, true
end

local function add_linking(linking, from, m)
  for i = from, from + m - 1, 1000 do
    redis.call('PFADD', linking, unpack(ARGV, i, math.min(i + 999, from + m - 1)))
  end
end

local a = 8
for g = 0, ngroups - 1 do
  local host, budget, seed, m = ARGV[a], tonumber(ARGV[a + 1]), ARGV[a + 2], tonumber(ARGV[a + 3])
  a = a + 4
  local hk, hot, cold, linking = KEYS[8 + 4 * g], KEYS[9 + 4 * g], KEYS[10 + 4 * g], KEYS[11 + 4 * g]
  add_linking(linking, a, m)
  a = a + m
  local n = tonumber(ARGV[a])
  a = a + 1
  local f = redis.call('HMGET', hk, 'state', 'admitted', 'seeded')
  local state, admitted, seeded = f[1], tonumber(f[2] or '0'), f[3]
  if not state then
    state = 'active'
    redis.call('HSET', hk, 'state', state, 'boost', '1')
    redis.call('SADD', KEYS[7], host)
  end
  if seed == '1' and not seeded then
    seeded = '1'
    redis.call('HSET', hk, 'seeded', seeded)
  end
  local limit, earned = host_limit(budget, linking, admitted + n, seeded)
  local changed = false  -- something was queued or credited: the host's counters change
  local reschedule = false  -- the host's best score may have risen, or it was idle
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
        exclude(earned and 'host_link_budget' or 'host_budget', url)
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
  local m = tonumber(ARGV[a])
  add_linking(KEYS[8 + 4 * ngroups + l], a + 1, m)
  a = a + 1 + m
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
