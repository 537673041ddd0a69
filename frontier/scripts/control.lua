-- control: an operator's command on one politeness key.
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] due  KEYS[4] ready  KEYS[5] prio  KEYS[6] touched
-- KEYS[7] hosts   KEYS[8] controlled (hosts under operator control)
-- KEYS[9] host hash  KEYS[10] hot ZSET  KEYS[11] cold LIST
-- KEYS[12] held hot ZSET  KEYS[13] held cold LIST (a blocked host's queue, set aside)
-- ARGV[1] now (ms)  ARGV[2] host  ARGV[3] action  ARGV[4] value ('' for none)
-- ARGV[5] hot capacity  ARGV[6] create (1: make a record for a key not known yet)
-- ARGV[7] lowest boost  ARGV[8] highest boost  ARGV[9] longest delay (ms)
-- ARGV[10] min delay (ms)  ARGV[11] response-time factor  ARGV[12] cap on factor x response (ms)
-- ARGV[13] the suspect penalty (priority factor of a host marked untrusted)
-- Actions: boost <multiplier> | delay <ms> | pause | resume (a paused host) | block |
-- unblock (a blocked host) | clear (boost 1, no operator delay, due now; state kept) |
-- trust | untrust: the operator's mark on the host's trust (admit.lua, lease_take.lua),
-- which overrules the link-spam signals: trusted (trust 1, never a suspect) or untrusted
-- (trust 0, a suspect); the latest mark holds.
-- Every argument is checked before the first write (Redis does not roll back a script
-- that fails half way): a refusal is an error reply 'control refused: ...' with nothing
-- written.
-- Block sets the host's queued URLs aside (they count as excluded, reason host_blocked);
-- unblock queues them again. A delay change moves the host's next fetch at once: a shorter
-- delay pulls it in to now + the new gap at the latest, a longer one pushes it out to that.
-- After any command the host's next fetch is at most now + the longest delay.
-- Returns the host's state after the command.

local function finite(x)
  return x ~= nil and x == x and x ~= math.huge and x ~= -math.huge
end

local function refuse(why)
  return redis.error_reply('control refused: ' .. why)
end

local function shown(text)
  if #text > 40 then
    text = string.sub(text, 1, 37) .. '...'
  end
  return "'" .. string.gsub(text, '[^%w%.%-_:%[%]]', '?') .. "'"
end

local ACTIONS = {boost = true, delay = true, pause = true, resume = true, block = true,
                 unblock = true, clear = true, trust = true, untrust = true}

-- checks -------------------------------------------------------------------------------------
for _, i in ipairs({1, 5, 7, 8, 9, 10, 11, 12, 13}) do
  local x = tonumber(ARGV[i])
  if not finite(x) or x < 0 then
    return refuse('argument ' .. i .. ' is not a finite number >= 0')
  end
end
local now, host, action, raw = tonumber(ARGV[1]), ARGV[2], ARGV[3], ARGV[4]
local cap, create = tonumber(ARGV[5]), ARGV[6]
local boost_lo, boost_hi, delay_hi = tonumber(ARGV[7]), tonumber(ARGV[8]), tonumber(ARGV[9])
local min_delay, factor, rt_cap = tonumber(ARGV[10]), tonumber(ARGV[11]), tonumber(ARGV[12])
local penalty = tonumber(ARGV[13])
if cap < 1 then
  return refuse('hot capacity below 1')
end
if #host == 0 or #host > 255 or string.find(host, '[%c%s]') then
  return refuse(shown(host) .. ' is not a politeness key')
end
if not ACTIONS[action] then
  return refuse(shown(action) .. ' is not a host action')
end
local value = nil
if action == 'boost' or action == 'delay' then
  value = tonumber(raw)
  if not finite(value) then
    return refuse(action .. ' needs a finite number, not ' .. shown(raw))
  end
  if action == 'boost' and (value < boost_lo or value > boost_hi) then
    return refuse('boost ' .. shown(raw) .. ' is outside ' .. boost_lo .. ' to ' .. boost_hi)
  end
  if action == 'delay' and (value < 0 or value > delay_hi or value ~= math.floor(value)) then
    return refuse('delay ' .. shown(raw) .. ' ms is not a whole number from 0 to ' .. delay_hi)
  end
elseif raw ~= '' then
  return refuse(action .. ' takes no value')
end
local hk, hot, cold, held_hot, held_cold = KEYS[9], KEYS[10], KEYS[11], KEYS[12], KEYS[13]
if redis.call('EXISTS', hk) == 0 and create ~= '1' then
  return refuse('unknown host ' .. shown(host))
end

-- writes -------------------------------------------------------------------------------------
local S = {due = KEYS[3], ready = KEYS[4], prio = KEYS[5], touched = KEYS[6]}
if redis.call('HSETNX', hk, 'state', 'active') == 1 then
  redis.call('HSET', hk, 'boost', '1')
  redis.call('SADD', KEYS[7], host)
end

-- Move a whole queue (hot ZSET and cold LIST) to another, empty or not.
local function move_queue(from_hot, from_cold, to_hot, to_cold)
  if redis.call('EXISTS', to_hot) == 0 and redis.call('EXISTS', to_cold) == 0 then
    if redis.call('EXISTS', from_hot) == 1 then
      redis.call('RENAME', from_hot, to_hot)
    end
    if redis.call('EXISTS', from_cold) == 1 then
      redis.call('RENAME', from_cold, to_cold)
    end
    return
  end
  local q = queue_open(to_hot, to_cold, cap)
  local best = redis.call('ZRANGE', from_hot, 0, -1, 'WITHSCORES')
  for i = 1, #best, 2 do
    queue_push(q, best[i], best[i + 1])
  end
  for _, item in ipairs(redis.call('LRANGE', from_cold, 0, -1)) do
    local sp = string.find(item, ' ', 1, true)
    queue_push(q, string.sub(item, sp + 1), string.sub(item, 1, sp - 1))
  end
  queue_close(q)
  redis.call('DEL', from_hot, from_cold)
end

local function shift_counts(n, sign)  -- sign 1: queued -> excluded (block); -1: back
  if n == 0 then
    return
  end
  redis.call('HINCRBY', KEYS[1], 'queued', -sign * n)
  redis.call('HINCRBY', KEYS[1], 'excluded', sign * n)
  if redis.call('HINCRBY', KEYS[2], 'excluded:host_blocked', sign * n) == 0 then
    redis.call('HDEL', KEYS[2], 'excluded:host_blocked')
  end
end

local function gap(delay_ms)  -- the gap completion would give now, Retry-After aside
  local f = redis.call('HMGET', hk, 'crawl_ms', 'rt_ms')
  return math.max(min_delay, math.min(factor * tonumber(f[2] or '0'), rt_cap), delay_ms,
                  tonumber(f[1] or '0'))
end

local state = redis.call('HGET', hk, 'state')
local retime = function(when) return when end
if action == 'boost' then
  redis.call('HSET', hk, 'boost', tostring(value))
elseif action == 'delay' then
  local old = tonumber(redis.call('HGET', hk, 'delay_ms') or '0')
  if value > 0 then
    redis.call('HSET', hk, 'delay_ms', string.format('%d', value))
  else
    redis.call('HDEL', hk, 'delay_ms')
  end
  local target = now + gap(value)
  if value < old then
    retime = function(when) return math.min(when, target) end
  elseif value > old then
    retime = function(when) return math.max(when, target) end
  end
elseif action == 'clear' then
  redis.call('HSET', hk, 'boost', '1')
  redis.call('HDEL', hk, 'delay_ms')
  retime = function(_) return now end
elseif action == 'pause' then
  if state == 'active' then
    state = 'paused'
  end
elseif action == 'resume' then
  if state == 'paused' then
    state = 'active'
  end
elseif action == 'block' then
  if state ~= 'blocked' then
    state = 'blocked'
    local n = queue_length(hot, cold)
    move_queue(hot, cold, held_hot, held_cold)
    redis.call('HINCRBY', hk, 'held', n)
    shift_counts(n, 1)
  end
elseif action == 'trust' then
  redis.call('HSET', hk, 'mark', 'trusted', 'trust', '1', 'tfrom', 'operator', 'pf', '1')
  redis.call('HDEL', hk, 'suspect')
elseif action == 'untrust' then
  redis.call('HSET', hk, 'mark', 'untrusted', 'trust', '0', 'tfrom', 'operator', 'suspect', '1',
             'pf', tostring(penalty))
elseif action == 'unblock' then
  if state == 'blocked' then
    state = 'active'
    local n = tonumber(redis.call('HGET', hk, 'held') or '0')
    move_queue(held_hot, held_cold, hot, cold)
    redis.call('HDEL', hk, 'held')
    shift_counts(n, -1)
  end
end
redis.call('HSET', hk, 'state', state)

-- place the host: its next fetch, and due / ready / none -------------------------------------
local f = redis.call('HMGET', hk, 'lease', 'boost', 'next', 'delay_ms', 'pf', 'mark')
local in_ready = redis.call('ZSCORE', S.ready, host)
local in_due = redis.call('ZSCORE', S.due, host)
local base
if in_ready then
  base = now
elseif in_due then
  base = tonumber(in_due)
else
  base = math.max(now, tonumber(f[3] or '0'))
end
local when = math.floor(math.min(retime(base), now + delay_hi))
redis.call('HSET', hk, 'next', string.format('%d', when))
if leased(f[1]) then  -- its completion reads it afresh (complete.lua)
  touch(S, host)
end
if state ~= 'active' then
  redis.call('ZREM', S.due, host)
  redis.call('ZREM', S.ready, host)
  if state == 'blocked' then
    redis.call('HDEL', S.prio, host)
  end
elseif not leased(f[1]) then  -- a leased host is placed when its lease ends
  local url, score = best_url(hot, cold, cap)
  if not url then
    redis.call('ZREM', S.due, host)
    redis.call('ZREM', S.ready, host)
    redis.call('HDEL', S.prio, host)
  else
    local p = tonumber(score) * tonumber(f[2] or '1') * tonumber(f[5] or '1')
    redis.call('HSET', S.prio, host, p)
    if in_ready and when <= now then
      redis.call('ZADD', S.ready, p, host)
    else
      redis.call('ZREM', S.ready, host)
      redis.call('ZADD', S.due, when, host)
    end
  end
end

-- hosts under operator control
if state ~= 'active' or tonumber(f[2] or '1') ~= 1 or tonumber(f[4] or '0') > 0 or f[6] then
  redis.call('SADD', KEYS[8], host)
else
  redis.call('SREM', KEYS[8], host)
end
return state
