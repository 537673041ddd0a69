-- unclaim: hand claimed hosts back to ready, unleased (the caller picked better ones).
-- KEYS[1] ready   KEYS[2] claims   KEYS[3] prio
-- ARGV the hosts
-- A host whose claim is gone (expired and re-picked) is left alone.
-- Returns the number of hosts put back.
local back = 0
for _, host in ipairs(ARGV) do
  if redis.call('ZREM', KEYS[2], host) == 1 then
    local p = redis.call('HGET', KEYS[3], host)
    if p then
      redis.call('ZADD', KEYS[1], p, host)
      back = back + 1
    end
  end
end
return back
