-- reap: return expired leases of one partition to their hosts.
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] leases  KEYS[4] attempts  KEYS[5] dead
-- KEYS[6] due     KEYS[7] ready    KEYS[8] prio    KEYS[9] touched
-- KEYS[10 ..] per lease i (0-based): host hash, hot ZSET, cold LIST of the lease's host
-- KEYS[#KEYS] the ended journal (URLs that end dead here)
-- ARGV[1] now (ms)  ARGV[2] cutoff (ms)  ARGV[3] hot capacity  ARGV[4] max attempts
-- ARGV[5] n  ARGV[6 ..] lease members
-- A lease expiring at or after `cutoff`, or already gone, is left alone. An earlier one
-- counts as a failed attempt ('lease_expired'): the URL is queued again, or dead past the
-- limit, and its host is scheduled at `now` at the earliest. The cutoff is `now` for the
-- reaper; on resuming an embedded job every lease is an orphan and the cutoff is past
-- all of them, while hosts are still scheduled at the real `now`.
-- Returns a flat list of {lease member, 'requeued' | 'dead' | 'excluded'}.
local now = tonumber(ARGV[1])
local cutoff = tonumber(ARGV[2])
local cap = tonumber(ARGV[3])
local max_attempts = tonumber(ARGV[4])
local n = tonumber(ARGV[5])
local C = {counts = KEYS[1], reasons = KEYS[2], attempts = KEYS[4], dead = KEYS[5],
           ended = KEYS[#KEYS]}
local S = {due = KEYS[6], ready = KEYS[7], prio = KEYS[8], touched = KEYS[9]}
local out = {}
for i = 0, n - 1 do
  local member = ARGV[6 + i]
  local hk, hot, cold = KEYS[10 + 3 * i], KEYS[11 + 3 * i], KEYS[12 + 3 * i]
  local expiry = redis.call('ZSCORE', KEYS[3], member)
  if expiry and tonumber(expiry) < cutoff then
    local host, score, _, url = parse_lease(member)
    local id = string.sub(member, 1, string.find(member, '\n', 1, true) - 1)
    redis.call('ZREM', KEYS[3], member)
    if redis.call('HGET', hk, 'lease') == id then
      redis.call('HDEL', hk, 'lease')
      redis.call('SREM', S.touched, host)  -- the lease it was marked for is over
    end
    redis.call('HINCRBY', KEYS[1], 'leased', -1)
    local result = retry_or_bury(C, hk, hot, cold, url, score, 'lease_expired', cap, max_attempts)
    schedule(S, host, hk, hot, cold, cap, now)
    out[#out + 1] = member
    out[#out + 1] = result
  end
end
return out
