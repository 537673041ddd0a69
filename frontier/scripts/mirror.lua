-- mirror: count the pages a partition's hosts share with other hosts and cut the budget
-- of mirror hosts (Bharat, Broder, Dean & Henzinger, "A comparison of techniques to find
-- mirrored hosts on the WWW", JASIS 2000: a host whose pages are mostly the pages of
-- another host is its mirror).
-- KEYS[1] counts  KEYS[2] reasons  KEYS[3] mirrors SET  KEYS[4] ended journal
-- KEYS[5] due     KEYS[6] ready    KEYS[7] prio         KEYS[8] touched
-- KEYS[9 ..] per host i (0-based): host hash, copies hash, hot ZSET, cold LIST (4 keys)
-- ARGV[1] now (ms)  ARGV[2] hot capacity  ARGV[3] min pages (0: off)  ARGV[4] share
-- ARGV[5] slack  ARGV[6] number of hosts
-- then per host: host, pages compared (new fetches), m, m times (page mark, other host):
--                one of its pages found to be shared with a page of the other host
-- A host's copies hash keeps 'pages', 'dups' (its pages shared with other hosts, each
-- counted once: the field '#' .. page mark remembers it), and '>' .. other host -> its
-- pages shared with that host. A page is shared whichever of the two was fetched first:
-- hosts crawled side by side meet their copies in either order. Once pages >= min
-- pages and dups >= share x pages, the host is a mirror of the other host it shares most
-- with: its hash gets 'mirror' (that host) and 'mlim' = pages - dups + slack, the URLs it
-- may hold in all (admit.lua excludes more as 'mirror_host'), and its queue is cut to
-- what is left of that limit (the worst URLs go, excluded as 'mirror_host'). A host that
-- had a seed is vouched for by the operator and is never cut. A host below the share
-- again is a mirror no more.
-- Returns per host: 1 if it is a mirror now, else 0; then the URLs cut from queues.
local now, cap = tonumber(ARGV[1]), tonumber(ARGV[2])
local min_pages, share, slack = tonumber(ARGV[3]), tonumber(ARGV[4]), tonumber(ARGV[5])
local n = tonumber(ARGV[6])
local S = {due = KEYS[5], ready = KEYS[6], prio = KEYS[7], touched = KEYS[8]}
local out = {}
local cut_total = 0
local a = 7
for i = 0, n - 1 do
  local host, pages, m = ARGV[a], tonumber(ARGV[a + 1]), tonumber(ARGV[a + 2])
  a = a + 3
  local hk, ck, hot, cold = KEYS[9 + 4 * i], KEYS[10 + 4 * i], KEYS[11 + 4 * i], KEYS[12 + 4 * i]
  local p = redis.call('HINCRBY', ck, 'pages', pages)
  local added = 0
  for j = a, a + 2 * (m - 1), 2 do
    if redis.call('HSETNX', ck, '#' .. ARGV[j], ARGV[j + 1]) == 1 then
      redis.call('HINCRBY', ck, '>' .. ARGV[j + 1], 1)
      added = added + 1
    end
  end
  a = a + 2 * m
  local d = redis.call('HINCRBY', ck, 'dups', added)
  local mirror = min_pages > 0 and p >= min_pages and d >= share * p
      and redis.call('HEXISTS', hk, 'seeded') == 0
  if mirror then
    local best, most = nil, 0
    local all = redis.call('HGETALL', ck)
    for j = 1, #all, 2 do
      local field = all[j]
      if string.byte(field, 1) == 62 and tonumber(all[j + 1]) > most then  -- '>'
        best, most = string.sub(field, 2), tonumber(all[j + 1])
      end
    end
    local limit = math.max(1, p - d + slack)
    redis.call('HSET', hk, 'mirror', best or '', 'mlim', limit)
    redis.call('SADD', KEYS[3], host)
    -- the URLs no longer queued (fetched, leased, failed, excluded) count against it
    local f = redis.call('HMGET', hk, 'admitted')
    local hot_n, cold_n = redis.call('ZCARD', hot), redis.call('LLEN', cold)
    local queued = hot_n + cold_n
    local keep = math.max(0, limit - (tonumber(f[1] or '0') - queued))
    if queued > keep then
      local gone = {}
      if keep >= hot_n then  -- the cold list's newest arrivals go
        local from = keep - hot_n
        for _, item in ipairs(redis.call('LRANGE', cold, from, -1)) do
          gone[#gone + 1] = string.sub(item, string.find(item, ' ', 1, true) + 1)
        end
        if from == 0 then
          redis.call('DEL', cold)
        else
          redis.call('LTRIM', cold, 0, from - 1)
        end
      else  -- the whole cold list, and the worst of the hot window
        for _, item in ipairs(redis.call('LRANGE', cold, 0, -1)) do
          gone[#gone + 1] = string.sub(item, string.find(item, ' ', 1, true) + 1)
        end
        redis.call('DEL', cold)
        local low = redis.call('ZPOPMIN', hot, hot_n - keep)
        for j = 1, #low, 2 do
          gone[#gone + 1] = low[j]
        end
      end
      for _, url in ipairs(gone) do
        journal(KEYS[4], 'excluded', 'mirror_host', url)
      end
      redis.call('HINCRBY', KEYS[1], 'queued', -#gone)
      redis.call('HINCRBY', KEYS[1], 'excluded', #gone)
      redis.call('HINCRBY', KEYS[2], 'excluded:mirror_host', #gone)
      cut_total = cut_total + #gone
      schedule(S, host, hk, hot, cold, cap, now)  -- its best URL may be gone, or all
    end
  elseif redis.call('HEXISTS', hk, 'mlim') == 1 then
    redis.call('HDEL', hk, 'mirror', 'mlim')
    redis.call('SREM', KEYS[3], host)
  end
  out[#out + 1] = mirror and 1 or 0
end
out[#out + 1] = cut_total
return out
