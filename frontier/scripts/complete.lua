-- complete: end a batch of leases of one partition with their outcomes.
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] leases  KEYS[4] lease data  KEYS[5] attempts
-- KEYS[6] dead    KEYS[7] due      KEYS[8] ready   KEYS[9] prio         KEYS[10] claims
-- KEYS[11 ..] per lease i (0-based): host hash, hot ZSET, cold LIST of the lease's host
-- ARGV[1] now (ms)  ARGV[2] hot capacity  ARGV[3] max attempts  ARGV[4] min delay (ms)
-- ARGV[5] response-time factor  ARGV[6] cap on factor x response time (ms)  ARGV[7] n
-- then per lease: id, outcome (fetched|failed|excluded|retry), reason, response ms,
--                 extra delay ms (Retry-After, backoff), crawl-delay ms ('' = unchanged)
-- The host's next fetch: now + max(min delay, crawl-delay, operator delay, extra,
-- min(factor x response time, cap)).
-- Returns one status per lease: 'ok', 'not_held' (unknown or reaped) or 'expired'.
local now = tonumber(ARGV[1])
local cap = tonumber(ARGV[2])
local max_attempts = tonumber(ARGV[3])
local min_delay, factor, rt_cap = tonumber(ARGV[4]), tonumber(ARGV[5]), tonumber(ARGV[6])
local n = tonumber(ARGV[7])
local C = {counts = KEYS[1], reasons = KEYS[2], attempts = KEYS[5], dead = KEYS[6]}
local S = {due = KEYS[7], ready = KEYS[8], prio = KEYS[9], claims = KEYS[10]}
local out = {}
local a = 8
for i = 0, n - 1 do
  local id, outcome, reason = ARGV[a], ARGV[a + 1], ARGV[a + 2]
  local rt, extra, crawl = tonumber(ARGV[a + 3]), tonumber(ARGV[a + 4]), ARGV[a + 5]
  a = a + 6
  local hk, hot, cold = KEYS[11 + 3 * i], KEYS[12 + 3 * i], KEYS[13 + 3 * i]
  local expiry = redis.call('ZSCORE', KEYS[3], id)
  if not expiry then
    out[#out + 1] = 'not_held'
  elseif tonumber(expiry) < now then
    out[#out + 1] = 'expired'
  else
    local host, score, attempts, url = parse_lease(redis.call('HGET', KEYS[4], id))
    redis.call('ZREM', KEYS[3], id)
    redis.call('HDEL', KEYS[4], id)
    redis.call('HDEL', hk, 'lease')
    redis.call('HINCRBY', KEYS[1], 'leased', -1)
    if outcome == 'retry' then
      retry_or_bury(C, hk, hot, cold, url, score, reason, cap, max_attempts)
    else
      if attempts ~= '0' then
        redis.call('HDEL', KEYS[5], url)
      end
      redis.call('HINCRBY', KEYS[1], outcome, 1)
      if outcome == 'fetched' then
        redis.call('HINCRBY', hk, 'fetched', 1)
      else
        redis.call('HINCRBY', KEYS[2], outcome .. ':' .. reason, 1)
      end
    end
    if crawl ~= '' then
      redis.call('HSET', hk, 'crawl_ms', crawl)
    end
    local f = redis.call('HMGET', hk, 'delay_ms', 'crawl_ms')
    local gap = math.max(min_delay, math.min(factor * rt, rt_cap), extra,
                         tonumber(f[1] or '0'), tonumber(f[2] or '0'))
    redis.call('HSET', hk, 'next', math.floor(now + gap), 'rt_ms', rt)
    schedule(S, host, hk, hot, now)
    out[#out + 1] = 'ok'
  end
end
return out
