-- lease_take: lease the best URL of each host claimed by lease_pick.
-- KEYS[1] counts   KEYS[2] claims   KEYS[3] leases   KEYS[4] attempts   KEYS[5] prio
-- KEYS[6 ..] per host i (0-based): host hash, hot ZSET, cold LIST (3 keys)
-- ARGV[1] lease expiry (ms)  ARGV[2] partition index  ARGV[3] n  ARGV[4] hot capacity
-- ARGV[5 ..] the n hosts
-- A host is leased only if its claim is still held, it is active and holds no lease: so
-- at most one lease per politeness key exists at any time.
-- Returns the lease members ('id\nhost\nscore\nattempts\nurl'), one per lease.
local n = tonumber(ARGV[3])
local out = {}
local held = {}
local seq = redis.call('HINCRBY', KEYS[1], 'lease_seq', n) - n
local retried = redis.call('HLEN', KEYS[4]) > 0
for i = 0, n - 1 do
  local host = ARGV[5 + i]
  local hk, hot, cold = KEYS[6 + 3 * i], KEYS[7 + 3 * i], KEYS[8 + 3 * i]
  if redis.call('ZREM', KEYS[2], host) == 1 then
    local f = redis.call('HMGET', hk, 'state', 'lease')
    if f[1] == 'active' and not f[2] then
      local url, score = pop_best(hot, cold, tonumber(ARGV[4]))
      if url then
        seq = seq + 1
        local id = ARGV[2] .. '-' .. seq
        local attempts = retried and redis.call('HGET', KEYS[4], url) or '0'
        local member = id .. '\n' .. host .. '\n' .. score .. '\n' .. attempts .. '\n' .. url
        held[#held + 1] = ARGV[1]
        held[#held + 1] = member
        redis.call('HSET', hk, 'lease', id)
        out[#out + 1] = member
      else
        redis.call('HDEL', KEYS[5], host)
      end
    end
  end
end
if #out > 0 then
  each_chunk(held, 1000, function(...) redis.call('ZADD', KEYS[3], ...) end)
  redis.call('HINCRBY', KEYS[1], 'queued', -#out)
  redis.call('HINCRBY', KEYS[1], 'leased', #out)
end
return out
