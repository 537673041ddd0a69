-- control: an operator's command on one politeness key.
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] due  KEYS[4] ready  KEYS[5] prio  KEYS[6] claims
-- KEYS[7] hosts   KEYS[8] host hash  KEYS[9] hot ZSET  KEYS[10] cold LIST
-- ARGV[1] now (ms)  ARGV[2] host  ARGV[3] action  ARGV[4] value  ARGV[5] hot capacity
-- Actions: boost <multiplier> | pause | resume (a paused host) | block | unblock (a blocked
-- host) | delay <ms>.
-- Block drops the host's queue: its URLs end as excluded (reason host_blocked).
-- Returns the host's state after the command.
local now, host, action, value = tonumber(ARGV[1]), ARGV[2], ARGV[3], ARGV[4]
local S = {due = KEYS[3], ready = KEYS[4], prio = KEYS[5], claims = KEYS[6]}
local hk, hot, cold = KEYS[8], KEYS[9], KEYS[10]
if redis.call('HSETNX', hk, 'state', 'active') == 1 then
  redis.call('HSET', hk, 'boost', '1')
  redis.call('SADD', KEYS[7], host)
end
local function unschedule()
  redis.call('ZREM', S.due, host)
  redis.call('ZREM', S.ready, host)
end
if action == 'boost' then
  redis.call('HSET', hk, 'boost', value)
elseif action == 'pause' then
  if redis.call('HGET', hk, 'state') == 'active' then
    redis.call('HSET', hk, 'state', 'paused')
  end
  unschedule()
elseif action == 'resume' then
  if redis.call('HGET', hk, 'state') == 'paused' then
    redis.call('HSET', hk, 'state', 'active')
  end
elseif action == 'unblock' then
  if redis.call('HGET', hk, 'state') == 'blocked' then
    redis.call('HSET', hk, 'state', 'active')
  end
elseif action == 'block' then
  redis.call('HSET', hk, 'state', 'blocked')
  unschedule()
  redis.call('HDEL', S.prio, host)
  local dropped = queue_length(hot, cold)
  if dropped > 0 then
    redis.call('DEL', hot, cold)
    redis.call('HINCRBY', KEYS[1], 'queued', -dropped)
    redis.call('HINCRBY', KEYS[1], 'excluded', dropped)
    redis.call('HINCRBY', KEYS[2], 'excluded:host_blocked', dropped)
  end
elseif action == 'delay' then
  redis.call('HSET', hk, 'delay_ms', value)
else
  return redis.error_reply('unknown host action ' .. action)
end
schedule(S, host, hk, hot, cold, tonumber(ARGV[5]), now)
return redis.call('HGET', hk, 'state')
