-- lease_take: lease the best URL of each host lease_pick showed, while it is still ready.
-- KEYS[1] counts   KEYS[2] ready   KEYS[3] leases   KEYS[4] attempts   KEYS[5] prio
-- KEYS[6] due
-- KEYS[7 ..] per host i (0-based): host hash, hot ZSET, cold LIST, out-hosts HLL (4 keys)
-- ARGV[1] lease expiry (ms)  ARGV[2] partition index  ARGV[3] n  ARGV[4] hot capacity
-- ARGV[5] now (ms)  ARGV[6] gap between fetches of a suspect (ms)
-- ARGV[7] gap between fetches of an untrusted host (ms)  ARGV[8] trust threshold
-- ARGV[9] probation of a new host (ms)  ARGV[10] want: hosts to take at most
-- ARGV[11 ..] the n hosts: the caller's choice first, then stand-ins, best first
-- A host is leased only if this call takes it out of ready (no other caller did), it is
-- active and holds no lease: so at most one lease per politeness key exists at any time.
-- Each host is taken out of ready by its own ZREM, whose reply (1 or 0) tells whether it
-- was still there: one call instead of a read of its score (a reply Redis formats as a
-- double, thousands of instructions) and its share of a removal of all at the end.
-- Hosts are taken in order until `want` are: a host another caller took since lease_pick
-- is replaced by the next stand-in (one held back or with nothing queued is not).
-- Link spam (docs/priority.md): a host whose trust is below the threshold (admit.lua), and
-- not endorsed (its priority factor 'pf' below 1), is leased at most once per untrusted gap, a link-spam suspect once per suspect gap (the
-- budget enforcement of IRLbot, Lee et al. WWW 2008, slows such hosts rather than drop
-- them): the gap counts from its last lease ('tlease'), by its standing now; a host held
-- back goes to due at its next allowed time. A host on probation (admit.lua: found through
-- links, not yet vouched for by enough trusted hosts, never fetched) is first leased a
-- probation after it was found. Seeds' hosts and hosts the operator marked trusted are
-- never held back.
-- Returns the lease members ('id\nhost\nscore\nattempts\ntrust\ncarry\nurl'), one per
-- lease. The trust field is 'T/O': T the host's trust ('x' for a suspect, '-' for a host
-- whose trust is not tracked), O the distinct other hosts its fetched pages linked to so
-- far. The carry field is what completing the lease needs to place the host again without
-- reading it (complete.lua), as it stands now: 'next,delay_ms,crawl_ms,boost,pf,fetched',
-- next being the best score queued after this URL ('' for none) and empty fields absent
-- ones. Whatever changes the host while it is leased marks it touched (_lib.lua), and its
-- completion then reads it afresh.
local n = tonumber(ARGV[3])
local now = tonumber(ARGV[5])
local suspect_gap, untrusted_gap = tonumber(ARGV[6]), tonumber(ARGV[7])
local threshold = tonumber(ARGV[8])
local probation = tonumber(ARGV[9])
local want = tonumber(ARGV[10])
local cap = tonumber(ARGV[4])
local taken = 0
local out = {}
local nout = 0
local held = {}
local seq = redis.call('HINCRBY', KEYS[1], 'lease_seq', n) - n
local retried = redis.call('HLEN', KEYS[4]) > 0
for i = 0, n - 1 do
  if taken >= want then
    break
  end
  local host = ARGV[11 + i]
  local hk, hot, cold, outs = KEYS[7 + 4 * i], KEYS[8 + 4 * i], KEYS[9 + 4 * i], KEYS[10 + 4 * i]
  if redis.call('ZREM', KEYS[2], host) == 1 then  -- still ready (and not named twice)
    taken = taken + 1
    local f = redis.call('HMGET', hk, 'state', 'lease', 'trust', 'suspect', 'tlease', 'seeded',
                         'mark', 'probe', 'pf', 'delay_ms', 'crawl_ms', 'boost', 'fetched')
    local lease = f[2]
    if f[1] == 'active' and (not lease or lease == '') then  -- (leased(), in line)
      local gap, probing = 0, false
      local trust = f[3]
      local allowed = 0  -- (its last lease's time matters only when a gap applies)
      if trust and not f[6] and f[7] ~= 'trusted' then
        allowed = tonumber(f[5] or '0')
        if f[4] then
          gap = suspect_gap
        elseif tonumber(trust) < threshold and f[9] ~= '1' then  -- not endorsed (admit.lua)
          gap = untrusted_gap
          if f[8] then  -- on probation: its first fetch waits
            allowed, probing = math.max(allowed, tonumber(f[8]) + probation - gap), true
          end
        end
      end
      allowed = allowed + gap  -- by the host's standing now
      local wait = (gap > 0 or probing) and allowed > now
      local url, score, next = nil, nil, nil
      if wait then
        redis.call('ZADD', KEYS[6], string.format('%d', allowed), host)  -- back to due at its time
      else
        url, score, next = pop_best(hot, cold, cap)
      end
      if url then
        seq = seq + 1
        local id = string.format('%s-%d', ARGV[2], seq)  -- ('..' would format seq as '%.14g')
        local attempts = retried and redis.call('HGET', KEYS[4], url) or '0'
        local signal = '-/0'
        if trust then
          signal = string.format('%s/%d', f[4] and 'x' or trust, redis.call('PFCOUNT', outs))
        end
        local member = id .. '\n' .. host .. '\n' .. score .. '\n' .. attempts .. '\n' .. signal
                       .. '\n' .. next .. ',' .. (f[10] or '') .. ',' .. (f[11] or '') .. ','
                       .. (f[12] or '') .. ',' .. (f[9] or '') .. ',' .. (f[13] or '')
                       .. '\n' .. url
        nout = nout + 1
        held[2 * nout - 1], held[2 * nout] = ARGV[1], member
        out[nout] = member
        if trust then
          redis.call('HSET', hk, 'lease', id, 'tlease', ARGV[5])
        else
          redis.call('HSET', hk, 'lease', id)
        end
      elseif not wait then
        redis.call('HDEL', KEYS[5], host)
      end
    end
  end
end
if nout > 0 then
  each_chunk(held, 1000, function(...) redis.call('ZADD', KEYS[3], ...) end)
  redis.call('HINCRBY', KEYS[1], 'queued', -nout)
  redis.call('HINCRBY', KEYS[1], 'leased', nout)
end
return out
