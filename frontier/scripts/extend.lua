-- extend: push the expiry of leases still held forward (a worker's heartbeat).
-- KEYS[1] leases (the partition's leases ZSET)
-- ARGV[1] now (ms)  ARGV[2] new expiry (ms)  ARGV[3 ..] lease members
-- A lease is extended only while it is held and not expired: an expired lease belongs to
-- the reaper, whether or not it ran yet. Only the score (the expiry) changes; the member,
-- which the worker holds, stays the same. An expiry is never moved earlier.
-- Returns one status per lease: 'ok', 'not_held' (unknown, completed or reaped) or
-- 'expired'.
local now = tonumber(ARGV[1])
local expires = tonumber(ARGV[2])
local out = {}
for i = 3, #ARGV do
  local member = ARGV[i]
  local expiry = redis.call('ZSCORE', KEYS[1], member)
  if not expiry then
    out[#out + 1] = 'not_held'
  elseif tonumber(expiry) < now then
    out[#out + 1] = 'expired'
  else
    if tonumber(expiry) < expires then
      redis.call('ZADD', KEYS[1], 'XX', expires, member)
    end
    out[#out + 1] = 'ok'
  end
end
return out
