-- complete: end a batch of leases of one partition with their outcomes.
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] leases  KEYS[4] attempts  KEYS[5] dead
-- KEYS[6] due     KEYS[7] ready    KEYS[8] prio    KEYS[9] touched
-- KEYS[10 ..] per lease i (0-based): host hash, hot ZSET, cold LIST of the lease's host
-- KEYS[#KEYS] the ended journal (URLs that end dead, or excluded by a block, here)
-- ARGV[1] now (ms)  ARGV[2] hot capacity  ARGV[3] max attempts  ARGV[4] min delay (ms)
-- ARGV[5] response-time factor  ARGV[6] cap on factor x response time (ms)  ARGV[7] n
-- then per lease: lease member, outcome (fetched|failed|excluded|retry|release), reason,
--                 response ms, extra delay ms (Retry-After, backoff), crawl-delay ms ('' = unchanged)
-- The host's next fetch: now + max(min delay, crawl-delay, operator delay, extra,
-- min(factor x response time, cap)).
-- 'release' hands a lease back unfinished (a worker stopping or unable to write): the URL
-- is queued again as it was, its attempts stay as they were and no ended state is counted
-- (leased - 1, queued + 1). On a host blocked meanwhile it ends as excluded
-- (host_blocked), as the block did to the host's queued URLs.
-- A lease carries the host's facts as lease_take read them (lease_take.lua): a lease that
-- ends fetched, failed or excluded on a host nothing touched meanwhile (_lib.lua) places
-- the host from them, with no read of the host; the others (a touched host, a retry or
-- release that queues the URL again, a lease of the older form) read the host afresh.
-- Returns one status per lease: 'ok', 'not_held' (unknown or reaped) or 'expired'.
local now = tonumber(ARGV[1])
local cap = tonumber(ARGV[2])
local max_attempts = tonumber(ARGV[3])
local min_delay, factor, rt_cap = tonumber(ARGV[4]), tonumber(ARGV[5]), tonumber(ARGV[6])
local n = tonumber(ARGV[7])
local C = {counts = KEYS[1], reasons = KEYS[2], attempts = KEYS[4], dead = KEYS[5],
           ended = KEYS[#KEYS]}
local S = {due = KEYS[6], ready = KEYS[7], prio = KEYS[8], touched = KEYS[9]}
local out = {}
local tally = {}
local ended = {}
local released = {prio = {}, due = {}, idle = {}}
local requeued = 0  -- leases handed back
local members = {}
for i = 0, n - 1 do
  members[i + 1] = ARGV[8 + 6 * i]
end
local expiries = n > 0 and redis.call('ZMSCORE', KEYS[3], unpack(members)) or {}
local hosts, scores, tries, urls, carries = {}, {}, {}, {}, {}  -- per lease, parsed once
for i = 1, n do
  hosts[i], scores[i], tries[i], urls[i], carries[i] = parse_lease(members[i])
end
local touched = {}  -- per lease: its host was touched while leased
if n > 0 and redis.call('SCARD', S.touched) > 0 then
  touched = redis.call('SMISMEMBER', S.touched, unpack(hosts))
end
local fresh = {}  -- touched hosts read afresh here: no longer touched
local function text(v)  -- a carried field: '' stands for an absent one
  if v == '' then
    return nil
  end
  return v
end
local a = 8
for i = 0, n - 1 do
  local member, outcome, reason = ARGV[a], ARGV[a + 1], ARGV[a + 2]
  local rt_text, extra, crawl = ARGV[a + 3], tonumber(ARGV[a + 4]), ARGV[a + 5]
  local rt = tonumber(rt_text)
  a = a + 6
  local hk, hot, cold = KEYS[10 + 3 * i], KEYS[11 + 3 * i], KEYS[12 + 3 * i]
  local expiry = expiries[i + 1]  -- one ZMSCORE for the batch
  if not expiry or ended[member] then  -- (the leases ZSET is trimmed at the end)
    out[#out + 1] = 'not_held'
  elseif tonumber(expiry) < now then
    out[#out + 1] = 'expired'
  else
    local host, score, attempts, url = hosts[i + 1], scores[i + 1], tries[i + 1], urls[i + 1]
    local carry = carries[i + 1]
    ended[#ended + 1] = member
    ended[member] = true
    local f, best
    local carried = carry and touched[i + 1] ~= 1 and outcome ~= 'release' and outcome ~= 'retry'
    if carried then
      local next, delay, crawl_ms, boost, pf, fetched =
        string.match(carry, '^([^,]*),([^,]*),([^,]*),([^,]*),([^,]*),([^,]*)$')
      f = {text(delay), text(crawl_ms), text(boost), 'active', text(fetched), text(pf)}
      best = text(next)
    else
      f = redis.call('HMGET', hk, 'delay_ms', 'crawl_ms', 'boost', 'state', 'fetched', 'pf')
      if touched[i + 1] == 1 then
        fresh[#fresh + 1] = host
      end
    end
    local fetched = tonumber(f[5] or '0')
    if outcome == 'release' then
      if f[4] == 'blocked' then
        redis.call('HDEL', KEYS[4], url)
        tally['excluded:host_blocked'] = (tally['excluded:host_blocked'] or 0) + 1
        journal(C.ended, 'excluded', 'host_blocked', url)
      else
        push_url(hot, cold, url, score, cap)
        requeued = requeued + 1
      end
    elseif outcome == 'retry' then
      retry_or_bury(C, hk, hot, cold, url, score, reason, cap, max_attempts)
    else
      if attempts ~= '0' then
        redis.call('HDEL', KEYS[4], url)
      end
      if outcome == 'fetched' then
        fetched = fetched + 1
      end
      local key = outcome == 'fetched' and outcome or (outcome .. ':' .. reason)
      tally[key] = (tally[key] or 0) + 1
    end
    if crawl ~= '' then
      f[2] = crawl
    end
    -- max(min delay, min(factor x rt, cap), extra, operator delay, crawl-delay), compared
    -- in line (each call of a library function costs about as much as a Redis command's
    -- own work here)
    local gap = factor * rt
    if gap > rt_cap then
      gap = rt_cap
    end
    if gap < min_delay then
      gap = min_delay
    end
    if extra > gap then
      gap = extra
    end
    if f[1] then
      local delay = tonumber(f[1])
      if delay > gap then
        gap = delay
      end
    end
    if f[2] and f[2] ~= '0' then
      local delay = tonumber(f[2])
      if delay > gap then
        gap = delay
      end
    end
    -- numbers go to Redis as text made here (see schedule_released; '%d' drops the
    -- fraction of a positive time, as floor would); the lease field is cleared in the same
    -- call ('' = no lease, _lib.lua)
    local next_ms = string.format('%d', now + gap)
    redis.call('HSET', hk, 'next', next_ms, 'rt_ms', rt_text, 'crawl_ms', f[2] or '0',
               'fetched', string.format('%d', fetched), 'lease', '')
    if f[4] == 'active' then
      local boost = 1
      if f[3] and f[3] ~= '1' then
        boost = tonumber(f[3])
      end
      if f[6] and f[6] ~= '1' then
        boost = boost * tonumber(f[6])
      end
      if not carried then
        local _
        _, best = best_url(hot, cold, cap)
      end
      schedule_released(released, host, best, boost, next_ms)
    end
    out[#out + 1] = 'ok'
  end
end
if #ended > 0 then
  each_chunk(ended, 1000, function(...) redis.call('ZREM', KEYS[3], ...) end)
  redis.call('HINCRBY', KEYS[1], 'leased', -#ended)
end
each_chunk(fresh, 1000, function(...) redis.call('SREM', S.touched, ...) end)
if requeued > 0 then
  redis.call('HINCRBY', KEYS[1], 'queued', requeued)
end
flush_released(S, released)
for key, count in pairs(tally) do
  if key == 'fetched' then
    redis.call('HINCRBY', KEYS[1], 'fetched', count)
  else
    redis.call('HINCRBY', KEYS[1], string.match(key, '^[a-z]+'), count)
    redis.call('HINCRBY', KEYS[2], key, count)
  end
end
return out
