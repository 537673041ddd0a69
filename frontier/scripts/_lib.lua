-- Shared helpers, prepended to every script by frontier/scripts.py.
-- They touch only keys handed to them by the calling script (all from KEYS).
-- Scores are integers: cash in micro-units times 4096, plus 256 times the redirect hops
-- (0..15), plus the link depth (0..255); see frontier/model.py. Scripts only compare them.

-- A host's queue: up to `cap` URLs sorted in `hot` (a listpack ZSET), the rest waiting in
-- `cold` (a LIST of 'score url', arrival order). A URL goes hot while there is room, or
-- when it beats the lowest hot URL (which then goes cold). Leases pop the best hot URL;
-- when hot runs empty, the oldest `cap` cold URLs move in at once. So a lease costs one
-- call, and a host has queued URLs iff hot or cold is non-empty. Open the queue, push
-- URLs, close it: the hot size and lowest score are tracked locally, and cold entries are
-- written in one RPUSH per batch.
local function queue_open(hot, cold, cap)
  return {hot = hot, cold = cold, cap = cap, size = redis.call('ZCARD', hot), low = nil, spill = {}}
end

local function queue_low(q)
  if q.low == nil then
    local low = redis.call('ZRANGE', q.hot, '0', '0', 'WITHSCORES')
    q.low = tonumber(low[2])
  end
  return q.low
end

local function queue_push(q, url, score)
  if q.size < q.cap then
    redis.call('ZADD', q.hot, score, url)
    q.size = q.size + 1
    q.low = nil
  elseif tonumber(score) > queue_low(q) then
    local low = redis.call('ZPOPMIN', q.hot)
    q.spill[#q.spill + 1] = low[2] .. ' ' .. low[1]
    redis.call('ZADD', q.hot, score, url)
    q.low = nil
  else
    q.spill[#q.spill + 1] = score .. ' ' .. url
  end
end

local function queue_close(q)
  local spill = q.spill
  for i = 1, #spill, 1000 do
    redis.call('RPUSH', q.cold, unpack(spill, i, math.min(i + 999, #spill)))
  end
end

local function push_url(hot, cold, url, score, cap)
  local q = queue_open(hot, cold, cap)
  queue_push(q, url, score)
  queue_close(q)
end

-- Move the oldest `cap` cold URLs into an empty hot window; returns how many moved. They
-- go in best first: a listpack ZSET inserts each member after a scan from its head (each
-- score read back as text), so in that order every insert stops at the first entry.
local function refill(hot, cold, cap)
  local items = redis.call('LPOP', cold, tostring(cap))
  if not items then
    return 0
  end
  local rows = {}
  for i = 1, #items do
    local item = items[i]
    local sp = string.find(item, ' ', 1, true)
    local score = string.sub(item, 1, sp - 1)
    rows[i] = {tonumber(score), score, string.sub(item, sp + 1)}
  end
  table.sort(rows, function(x, y) return x[1] > y[1] end)
  local add = {}
  for i = 1, #rows do
    add[2 * i - 1], add[2 * i] = rows[i][2], rows[i][3]
  end
  redis.call('ZADD', hot, unpack(add))
  return #items
end

-- The host's best queued URL and score (refilling an empty hot window), or nil. (Numbers
-- handed to redis.call here and below are written as text: Redis formats a Lua number
-- with '%.17g' on every call, about a microsecond each.)
local function best_url(hot, cold, cap)
  local best = redis.call('ZREVRANGE', hot, '0', '0', 'WITHSCORES')
  if #best == 0 and refill(hot, cold, cap) > 0 then
    best = redis.call('ZREVRANGE', hot, '0', '0', 'WITHSCORES')
  end
  return best[1], best[2]
end

-- Pop the host's best URL (refilling an empty hot window first) and tell the score of the
-- best one left ('' when none is left): url, score, next. The window is refilled at once
-- when the pop empties it, so `next` is the host's best queued score after the pop. Read
-- and removed by rank: on a listpack window ZPOPMAX looks its member up again from the
-- head, a scan of the whole window; removing the last rank is a seek from the tail.
local function pop_best(hot, cold, cap)
  local top = redis.call('ZREVRANGE', hot, '0', '1', 'WITHSCORES')
  if #top == 0 then
    if refill(hot, cold, cap) == 0 then
      return nil, nil, ''
    end
    top = redis.call('ZREVRANGE', hot, '0', '1', 'WITHSCORES')
  end
  redis.call('ZREMRANGEBYRANK', hot, '-1', '-1')
  local next = top[4]
  if not next then  -- the pop emptied the window: refill it now
    next = ''
    if refill(hot, cold, cap) > 0 then
      next = redis.call('ZREVRANGE', hot, '0', '0', 'WITHSCORES')[2]
    end
  end
  return top[1], top[2], next
end

-- Whether a host hash's 'lease' field names a lease ('' once it ended: the field is
-- cleared in the same HSET as the host's next fetch time, not deleted).
local function leased(field)
  return field ~= nil and field ~= false and field ~= ''
end

-- A host whose queue, standing or controls changed while it is leased goes in the
-- partition's 'touched' SET: completing its lease then reads the host afresh instead of
-- trusting what lease_take carried in the lease (complete.lua).
local function touch(S, host)
  redis.call('SADD', S.touched, host)
end

local function queue_length(hot, cold)
  return redis.call('ZCARD', hot) + redis.call('LLEN', cold)
end

-- Put a host where it belongs: due (waiting for its time) or ready (time has come),
-- unless it is paused, blocked, leased or has nothing queued; a leased host is marked
-- touched instead (placed when its lease ends). Its priority is its best score x the
-- operator's boost x its trust factor 'pf' (admit.lua: 1 for a trusted host, less for an
-- untrusted one, the suspect penalty for a link-spam suspect).
-- S = {due=, ready=, prio=, touched=}
local function schedule(S, host, hk, hot, cold, cap, now)
  local f = redis.call('HMGET', hk, 'state', 'lease', 'boost', 'next', 'pf')
  if leased(f[2]) then
    touch(S, host)
    return
  end
  if f[1] ~= 'active' then
    return
  end
  local url, score = best_url(hot, cold, cap)
  if not url then
    redis.call('ZREM', S.due, host)
    redis.call('ZREM', S.ready, host)
    redis.call('HDEL', S.prio, host)
    return
  end
  local p = tonumber(score) * tonumber(f[3] or '1') * tonumber(f[5] or '1')
  redis.call('HSET', S.prio, host, p)
  if redis.call('ZSCORE', S.ready, host) then
    redis.call('ZADD', S.ready, p, host)
  else
    redis.call('ZADD', S.due, 'NX', math.max(now, tonumber(f[4] or '0')), host)
  end
end

-- Schedule a host whose lease just ended: it is in neither due nor ready, so only its
-- next time and priority are needed. `boost` (a number: the operator's boost x the trust
-- factor) and `score` (text: its best queued score, nil when none) come from the caller;
-- `next_ms` is text. The writes are gathered in `out` = {prio = {host, p, ...},
-- due = {ms, host, ...}, idle = {host, ...}, and np, nd, ni: their lengths} and made by
-- flush_released, a few calls for a whole batch. Values go to Redis as text (see
-- best_url). An unboosted priority is the score as the reply gave it (the same text a
-- number of at most 14 digits would give).
local function schedule_released(out, host, score, boost, next_ms)
  if not score then
    local ni = out.ni + 1
    out.idle[ni], out.ni = host, ni
    return
  end
  local np, nd = out.np, out.nd  -- (counts kept: '#' searches the table each time)
  local prio, due = out.prio, out.due
  prio[np + 1] = host
  if boost == 1 and #score <= 14 then
    prio[np + 2] = score
  else
    prio[np + 2] = score * boost
  end
  due[nd + 1], due[nd + 2] = next_ms, host
  out.np, out.nd = np + 2, nd + 2
end

local function each_chunk(items, step, fn)
  for i = 1, #items, step do
    fn(unpack(items, i, math.min(i + step - 1, #items)))
  end
end

local function flush_released(S, out)
  each_chunk(out.prio, 1000, function(...) redis.call('HSET', S.prio, ...) end)
  each_chunk(out.due, 1000, function(...) redis.call('ZADD', S.due, ...) end)
  each_chunk(out.idle, 1000, function(...) redis.call('HDEL', S.prio, ...) end)
end

-- The journal of URLs that reached a final state outside a worker's own completion: a
-- worker copies it into its fetch log, so the log accounts for every URL.
local function journal(ended, outcome, reason, url)
  redis.call('RPUSH', ended, outcome .. ' ' .. reason .. ' ' .. url)
end

-- A failed attempt: queue the URL again, or past the limit, move it to the dead letters.
-- Returns 'requeued', 'dead' or 'excluded' (the host was blocked meanwhile).
-- C = {counts=, reasons=, attempts=, dead=, ended=}
local function retry_or_bury(C, hk, hot, cold, url, score, reason, cap, max_attempts)
  if redis.call('HGET', hk, 'state') == 'blocked' then
    redis.call('HDEL', C.attempts, url)
    redis.call('HINCRBY', C.counts, 'excluded', 1)
    redis.call('HINCRBY', C.reasons, 'excluded:host_blocked', 1)
    journal(C.ended, 'excluded', 'host_blocked', url)
    return 'excluded'
  end
  local attempts = redis.call('HINCRBY', C.attempts, url, 1)
  if attempts >= max_attempts then
    redis.call('HDEL', C.attempts, url)
    redis.call('HSET', C.dead, url, reason)
    redis.call('HINCRBY', C.counts, 'dead', 1)
    redis.call('HINCRBY', C.reasons, 'dead:' .. reason, 1)
    journal(C.ended, 'dead', reason, url)
    return 'dead'
  end
  push_url(hot, cold, url, score, cap)
  redis.call('HINCRBY', C.counts, 'queued', 1)
  return 'requeued'
end

-- A lease is one member of the leases ZSET (score: expiry),
-- 'id\nhost\nscore\nattempts\ntrust\ncarry\nurl' (trust and carry: see lease_take; members
-- of older forms lack carry, or both); the worker holds the same string, so completing
-- needs no second lookup. Returns host, score, attempts, url, carry (nil when absent).
-- (One string.match costs about what finding each newline with string.find and cutting
-- the fields with string.sub does, 8,100 against 8,400 instructions, in one call.)
local function parse_lease(member)
  local host, score, attempts, carry, url =
    string.match(member, '^[^\n]*\n([^\n]*)\n([^\n]*)\n([^\n]*)\n[^\n]*\n([^\n]*)\n(.*)$')
  if host then
    return host, score, attempts, url, carry
  end
  local rest
  host, score, attempts, rest = string.match(member, '^[^\n]*\n([^\n]*)\n([^\n]*)\n([^\n]*)\n(.*)$')
  local nl = string.find(rest, '\n', 1, true)
  return host, score, attempts, nl and string.sub(rest, nl + 1) or rest, nil
end

-- The fields of a lease of the current form that completing it needs, in one match that
-- ends before the URL (the URL is cut out only when needed): host, attempts, then the
-- carry's six fields (lease_take.lua). One literal: a concatenation would run every call.
local CARRIED = '^[^\n]*\n([^\n]*)\n[^\n]*\n([^\n]*)\n[^\n]*\n([^,\n]*),([^,\n]*),([^,\n]*),([^,\n]*),([^,\n]*),([^,\n]*)\n'
