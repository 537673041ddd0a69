-- lease_take: lease the best URL of each host claimed by lease_pick.
-- KEYS[1] counts   KEYS[2] claims   KEYS[3] leases   KEYS[4] lease data   KEYS[5] attempts
-- KEYS[6] prio
-- KEYS[7 ..] per host i (0-based): host hash, hot ZSET, cold LIST (3 keys)
-- ARGV[1] lease expiry (ms)  ARGV[2] partition index  ARGV[3] n  ARGV[4 ..] the n hosts
-- A host is leased only if its claim is still held, it is active and holds no lease: so
-- at most one lease per politeness key exists at any time.
-- Returns a flat list of {lease id, host, url, score, attempts} per lease.
local n = tonumber(ARGV[3])
local out = {}
local leased = 0
for i = 0, n - 1 do
  local host = ARGV[4 + i]
  local hk, hot, cold = KEYS[7 + 3 * i], KEYS[8 + 3 * i], KEYS[9 + 3 * i]
  if redis.call('ZREM', KEYS[2], host) == 1 then
    local f = redis.call('HMGET', hk, 'state', 'lease')
    if f[1] == 'active' and not f[2] then
      local url, score = pop_best(hot, cold)
      if url then
        local seq = redis.call('HINCRBY', KEYS[1], 'lease_seq', 1)
        local id = ARGV[2] .. '-' .. seq
        local attempts = redis.call('HGET', KEYS[5], url) or '0'
        redis.call('ZADD', KEYS[3], ARGV[1], id)
        redis.call('HSET', KEYS[4], id, host .. '\n' .. score .. '\n' .. attempts .. '\n' .. url)
        redis.call('HSET', hk, 'lease', id)
        leased = leased + 1
        out[#out + 1] = id
        out[#out + 1] = host
        out[#out + 1] = url
        out[#out + 1] = score
        out[#out + 1] = attempts
      else
        redis.call('HDEL', KEYS[6], host)
      end
    end
  end
end
if leased > 0 then
  redis.call('HINCRBY', KEYS[1], 'queued', -leased)
  redis.call('HINCRBY', KEYS[1], 'leased', leased)
end
return out
