-- Shared helpers, prepended to every script by frontier/scripts.py.
-- They touch only keys handed to them by the calling script (all from KEYS).
-- Scores are integers: cash in micro-units times 256, plus the link depth (0..255).

local DEPTH_SCALE = 256

-- Queue one URL on its host: the best `cap` URLs stay sorted in `hot` (a listpack ZSET),
-- the rest wait in `cold` (a LIST of 'score url', arrival order).
local function push_url(hot, cold, url, score, cap)
  if redis.call('ZCARD', hot) < cap then
    redis.call('ZADD', hot, score, url)
    return
  end
  local low = redis.call('ZRANGE', hot, 0, 0, 'WITHSCORES')
  if tonumber(score) > tonumber(low[2]) then
    redis.call('ZPOPMIN', hot)
    redis.call('RPUSH', cold, low[2] .. ' ' .. low[1])
    redis.call('ZADD', hot, score, url)
  else
    redis.call('RPUSH', cold, score .. ' ' .. url)
  end
end

-- Pop the host's best URL; refill the hot window with one cold URL.
-- Invariant: cold is non-empty only while hot is full.
local function pop_best(hot, cold)
  local top = redis.call('ZPOPMAX', hot)
  if #top == 0 then
    return nil, nil
  end
  local item = redis.call('LPOP', cold)
  if item then
    local sp = string.find(item, ' ', 1, true)
    redis.call('ZADD', hot, string.sub(item, 1, sp - 1), string.sub(item, sp + 1))
  end
  return top[1], top[2]
end

local function queue_length(hot, cold)
  return redis.call('ZCARD', hot) + redis.call('LLEN', cold)
end

-- Put a host where it belongs: due (waiting for its time) or ready (time has come),
-- unless it is paused, blocked, leased, claimed, or has nothing queued.
-- S = {due=, ready=, prio=, claims=}
local function schedule(S, host, hk, hot, now)
  local f = redis.call('HMGET', hk, 'state', 'lease', 'boost', 'next')
  if f[1] ~= 'active' or f[2] then
    return
  end
  if redis.call('ZSCORE', S.claims, host) then
    return
  end
  local best = redis.call('ZREVRANGE', hot, 0, 0, 'WITHSCORES')
  if #best == 0 then
    redis.call('ZREM', S.due, host)
    redis.call('ZREM', S.ready, host)
    redis.call('HDEL', S.prio, host)
    return
  end
  local p = tonumber(best[2]) * tonumber(f[3] or '1')
  redis.call('HSET', S.prio, host, p)
  if redis.call('ZSCORE', S.ready, host) then
    redis.call('ZADD', S.ready, p, host)
  else
    redis.call('ZADD', S.due, 'NX', math.max(now, tonumber(f[4] or '0')), host)
  end
end

-- A failed attempt: queue the URL again, or past the limit, move it to the dead letters.
-- Returns 'requeued', 'dead' or 'excluded' (the host was blocked meanwhile).
-- C = {counts=, reasons=, attempts=, dead=}
local function retry_or_bury(C, hk, hot, cold, url, score, reason, cap, max_attempts)
  if redis.call('HGET', hk, 'state') == 'blocked' then
    redis.call('HDEL', C.attempts, url)
    redis.call('HINCRBY', C.counts, 'excluded', 1)
    redis.call('HINCRBY', C.reasons, 'excluded:host_blocked', 1)
    return 'excluded'
  end
  local attempts = redis.call('HINCRBY', C.attempts, url, 1)
  if attempts >= max_attempts then
    redis.call('HDEL', C.attempts, url)
    redis.call('HSET', C.dead, url, reason)
    redis.call('HINCRBY', C.counts, 'dead', 1)
    redis.call('HINCRBY', C.reasons, 'dead:' .. reason, 1)
    return 'dead'
  end
  push_url(hot, cold, url, score, cap)
  redis.call('HINCRBY', C.counts, 'queued', 1)
  return 'requeued'
end

-- Lease details are stored as 'host\nscore\nattempts\nurl'.
local function parse_lease(data)
  local a = string.find(data, '\n', 1, true)
  local b = string.find(data, '\n', a + 1, true)
  local c = string.find(data, '\n', b + 1, true)
  return string.sub(data, 1, a - 1), string.sub(data, a + 1, b - 1),
         string.sub(data, b + 1, c - 1), string.sub(data, c + 1)
end
