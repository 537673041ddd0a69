-- lease_pick: show the best hosts of one partition whose next-fetch time has come.
-- KEYS[1] due   KEYS[2] ready   KEYS[3] prio   KEYS[4] claims
-- ARGV[1] now (ms)  ARGV[2] how many hosts  ARGV[3] (unused)  ARGV[4] promote limit
-- Claims left by an older version (hosts picked and never taken) go back to due; due
-- hosts whose time has come move to ready at their priority; the best ready hosts are
-- returned, left in ready: no claim is written, so hosts the caller does not choose cost
-- nothing. Returns {host, priority, host, priority, ...}, best first. lease_take (with the
-- hosts' keys) takes each one out of ready as it leases it.
local now = tonumber(ARGV[1])
local stale = redis.call('ZRANGEBYSCORE', KEYS[4], '-inf', ARGV[1], 'LIMIT', '0', '1000')
for i = 1, #stale do  -- (numeric loops: ipairs calls a library function per step)
  local host = stale[i]
  redis.call('ZREM', KEYS[4], host)
  if redis.call('HEXISTS', KEYS[3], host) == 1 then
    redis.call('ZADD', KEYS[1], 'NX', now, host)
  end
end
local due = redis.call('ZRANGEBYSCORE', KEYS[1], '-inf', ARGV[1], 'LIMIT', '0', ARGV[4])
if #due > 0 then
  redis.call('ZREM', KEYS[1], unpack(due))
  local prios = redis.call('HMGET', KEYS[3], unpack(due))
  local add = {}
  for i = 1, #due do
    local host = due[i]
    if prios[i] then
      add[#add + 1] = prios[i]
      add[#add + 1] = host
    end
  end
  if #add > 0 then
    redis.call('ZADD', KEYS[2], unpack(add))
  end
end
-- the priorities as 'prio' holds them (the same values as the scores in ready): text, where
-- ZREVRANGE's WITHSCORES would format each score anew
local best = redis.call('ZREVRANGE', KEYS[2], '0', tostring(tonumber(ARGV[2]) - 1))
if #best == 0 then
  return best
end
local prios = redis.call('HMGET', KEYS[3], unpack(best))
local out = {}
for i = 1, #best do
  local host = best[i]
  if prios[i] then  -- (the skiplist mark has no priority: FrontierStore.skiplist_mark)
    out[#out + 1] = host
    out[#out + 1] = prios[i]
  end
end
return out
