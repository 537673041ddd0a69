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
local tally = {}  -- 'outcome:reason' -> count, for outcomes other than fetched
local nfetched = 0
local ended = {}  -- the members ended here, in order (and as a set)
local nended = 0
local released = {prio = {}, due = {}, idle = {}, np = 0, nd = 0, ni = 0}
local requeued = 0  -- leases handed back
local members = {}
for i = 0, n - 1 do
  members[i + 1] = ARGV[8 + 6 * i]
end
local expiries = n > 0 and redis.call('ZMSCORE', KEYS[3], unpack(members)) or {}
-- Per lease, parsed once: its host, attempts and carried fields (cf[6 * (i - 1) + 1 ..
-- + 6], carried[i]) in one match that stops before the URL; the score and URL only when
-- needed (full), and the whole member by parse_lease for a lease of the older form.
local hosts, tries, carried, cf, scores, urls = {}, {}, {}, {}, {}, {}
for i = 1, n do
  local k = 6 * (i - 1)
  local host, attempts
  host, attempts, cf[k + 1], cf[k + 2], cf[k + 3], cf[k + 4], cf[k + 5], cf[k + 6] =
    string.match(members[i], CARRIED)
  if host then
    hosts[i], tries[i], carried[i] = host, attempts, true
  else
    hosts[i], scores[i], tries[i], urls[i] = parse_lease(members[i])
    carried[i] = false
  end
end
local function full(i)  -- the lease's score and URL
  if urls[i] == nil then
    local _
    _, scores[i], _, urls[i] = parse_lease(members[i])
  end
  return scores[i], urls[i]
end
local touched = {}  -- per lease: its host was touched while leased
if n > 0 and redis.call('SCARD', S.touched) > 0 then
  touched = redis.call('SMISMEMBER', S.touched, unpack(hosts))
end
local fresh = {}  -- touched hosts read afresh here: no longer touched
local a = 8
for i = 0, n - 1 do
  local member, outcome, reason = ARGV[a], ARGV[a + 1], ARGV[a + 2]
  -- (numbers from text by arithmetic: '+ 0' converts as tonumber does, without the cost
  -- of a library call)
  local rt_text, extra, crawl = ARGV[a + 3], ARGV[a + 4] + 0, ARGV[a + 5]
  local rt = rt_text + 0
  a = a + 6
  local hk, hot, cold = KEYS[10 + 3 * i], KEYS[11 + 3 * i], KEYS[12 + 3 * i]
  local expiry = expiries[i + 1]  -- one ZMSCORE for the batch
  if not expiry or ended[member] then  -- (the leases ZSET is trimmed at the end)
    out[i + 1] = 'not_held'
  elseif expiry + 0 < now then
    out[i + 1] = 'expired'
  else
    local host, attempts = hosts[i + 1], tries[i + 1]
    nended = nended + 1
    ended[nended] = member
    ended[member] = true
    -- the host's fields, as text ('' for an absent one), carried or read afresh
    local delay, crawl_ms, boost_t, state, fetched_t, pf, best
    local fast = carried[i + 1] and touched[i + 1] ~= 1 and outcome ~= 'release'
                 and outcome ~= 'retry'
    if fast then
      local k = 6 * i
      best, delay, crawl_ms, boost_t = cf[k + 1], cf[k + 2], cf[k + 3], cf[k + 4]
      pf, fetched_t, state = cf[k + 5], cf[k + 6], 'active'
      if best == '' then
        best = nil
      end
    else
      local f = redis.call('HMGET', hk, 'delay_ms', 'crawl_ms', 'boost', 'state', 'fetched', 'pf')
      delay, crawl_ms, boost_t = f[1] or '', f[2] or '', f[3] or ''
      state, fetched_t, pf = f[4], f[5] or '', f[6] or ''
      if touched[i + 1] == 1 then
        fresh[#fresh + 1] = host
      end
    end
    local fetched = fetched_t == '' and 0 or fetched_t + 0
    if outcome == 'release' then
      local score, url = full(i + 1)
      if state == 'blocked' then
        redis.call('HDEL', KEYS[4], url)
        tally['excluded:host_blocked'] = (tally['excluded:host_blocked'] or 0) + 1
        journal(C.ended, 'excluded', 'host_blocked', url)
      else
        push_url(hot, cold, url, score, cap)
        requeued = requeued + 1
      end
    elseif outcome == 'retry' then
      local score, url = full(i + 1)
      retry_or_bury(C, hk, hot, cold, url, score, reason, cap, max_attempts)
    else
      if attempts ~= '0' then
        local _, url = full(i + 1)
        redis.call('HDEL', KEYS[4], url)
      end
      if outcome == 'fetched' then
        fetched = fetched + 1
        nfetched = nfetched + 1
      else
        local key = outcome .. ':' .. reason
        tally[key] = (tally[key] or 0) + 1
      end
    end
    if crawl ~= '' then
      crawl_ms = crawl
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
    if delay ~= '' then
      local ms = delay + 0
      if ms > gap then
        gap = ms
      end
    end
    if crawl_ms == '' then
      crawl_ms = '0'
    elseif crawl_ms ~= '0' then
      local ms = crawl_ms + 0
      if ms > gap then
        gap = ms
      end
    end
    -- numbers go to Redis as text made here (see schedule_released; '%d' drops the
    -- fraction of a positive time, as floor would); the lease field is cleared in the same
    -- call ('' = no lease, _lib.lua)
    local next_ms = string.format('%d', now + gap)
    redis.call('HSET', hk, 'next', next_ms, 'rt_ms', rt_text, 'crawl_ms', crawl_ms,
               'fetched', string.format('%d', fetched), 'lease', '')
    if state == 'active' then
      local boost = 1
      if boost_t ~= '' and boost_t ~= '1' then
        boost = boost_t + 0
      end
      if pf ~= '' and pf ~= '1' then
        boost = boost * pf
      end
      if not fast then
        local _
        _, best = best_url(hot, cold, cap)
      end
      schedule_released(released, host, best, boost, next_ms)
    end
    out[i + 1] = 'ok'
  end
end
if nended > 0 then
  each_chunk(ended, 1000, function(...) redis.call('ZREM', KEYS[3], ...) end)
  redis.call('HINCRBY', KEYS[1], 'leased', -nended)
end
each_chunk(fresh, 1000, function(...) redis.call('SREM', S.touched, ...) end)
if requeued > 0 then
  redis.call('HINCRBY', KEYS[1], 'queued', requeued)
end
flush_released(S, released)
if nfetched > 0 then
  redis.call('HINCRBY', KEYS[1], 'fetched', nfetched)
end
for key, count in pairs(tally) do
  redis.call('HINCRBY', KEYS[1], string.match(key, '^[a-z]+'), count)
  redis.call('HINCRBY', KEYS[2], key, count)
end
return out
