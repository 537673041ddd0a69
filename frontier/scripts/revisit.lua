-- revisit: the revisit state and schedule of one partition (continuous crawls).
-- KEYS[1] counts   KEYS[2] revisits (schedule ZSET 'host url' -> due ms)
-- KEYS[3] due   KEYS[4] ready   KEYS[5] prio   KEYS[6] touched
-- KEYS[7 ..] per item i (0-based): host hash, revisit state hash, hot ZSET, cold LIST (4 keys)
-- ARGV[1] op: 'record', 'release', 'drop' or 'sooner'   ARGV[2] now (ms)
-- ARGV[3] min interval (s)   ARGV[4] max interval (s)   ARGV[5] host revisits a day
-- ARGV[6] hot capacity   ARGV[7] n items
-- record, 7 arguments an item: host, url, score, kind ('200': a full response, '304': not
--   modified), payload digest ('' for none), ETag ('' for none), Last-Modified (epoch s,
--   '' for none). Updates the page's state and schedules its next visit. Returns per
--   item {changed (1, 0, or -1 for a first visit), interval (s)}.
-- release, 2 arguments an item: host, url. A page whose time has come goes back to its
--   host's queue as a new admission (admitted + 1, queued + 1), so the counts still add
--   up; a blocked host's page waits a max interval more. Returns the pages queued.
-- drop, 2 arguments an item: host, url. A page whose revisit ended otherwise than
--   fetched (gone, refused) is no longer tracked. Returns the pages dropped.
-- sooner, 3 arguments an item: host, url, lastmod (epoch s, a sitemap's <lastmod>). A
--   tracked page waiting in the schedule whose lastmod is after its last fetch becomes
--   due now, or at its last fetch + the min interval if that is later; never later than
--   it was. A page not tracked, or released and not fetched again yet, is left alone.
--   Returns the pages made due sooner.
-- State (frontier/revisit.py RevisitState): 'visits changes first last interval capture
-- digest score etag lastmod', times in s, '-' for none. Host hash fields: rv_n (pages
-- tracked), rv_load (their scheduled revisits a day), rv_mu (the host's multiplier, s).
-- Change rate: Cho & Garcia-Molina, TOIT 2003, r = -log((n - X + 0.5) / (n + 0.5)) / I.
-- Interval: the optimal-freshness allocation (Cho & Garcia-Molina, TODS 2003),
-- g(rate * I) = mu * rate with g(x) = 1 - (1 + x) e^-x, none (max) when mu * rate >= 1;
-- mu moves after every visit by (load / budget)^(1 / pages), so the host's load tends to
-- its budget (a dual ascent); an interval at most doubles between two visits.
local op, now = ARGV[1], tonumber(ARGV[2])
local lo, hi, budget = tonumber(ARGV[3]), tonumber(ARGV[4]), tonumber(ARGV[5])
local cap, n = tonumber(ARGV[6]), tonumber(ARGV[7])
local DAY = 86400
local now_s = math.floor(now / 1000)

local function unpack_state(raw)
  local f = {}
  for word in string.gmatch(raw, '[^ ]+') do
    f[#f + 1] = word
  end
  return {v = tonumber(f[1]), c = tonumber(f[2]), t0 = tonumber(f[3]), t1 = tonumber(f[4]),
          ivl = tonumber(f[5]), cap = tonumber(f[6]), dig = f[7], score = f[8], etag = f[9],
          lm = f[10]}
end

local function pack_state(s)
  return table.concat({s.v, s.c, s.t0, s.t1, s.ivl, s.cap, s.dig, s.score, s.etag, s.lm}, ' ')
end

local function g(x)
  return 1 - (1 + x) * math.exp(-x)
end

local function solve_g(y)
  local a, b = 0, 60
  for _ = 1, 60 do
    local mid = (a + b) / 2
    if g(mid) < y then a = mid else b = mid end
  end
  return (a + b) / 2
end

local function clamp(x, a, b)
  return math.min(b, math.max(a, x))
end

local out = {}
local a = 8
if op == 'record' then
  local first, revisited = 0, 0
  for i = 0, n - 1 do
    local hk, sk = KEYS[7 + 4 * i], KEYS[8 + 4 * i]
    local host, url, score, kind = ARGV[a], ARGV[a + 1], ARGV[a + 2], ARGV[a + 3]
    local digest, etag, lm = ARGV[a + 4], ARGV[a + 5], ARGV[a + 6]
    a = a + 7
    local raw = redis.call('HGET', sk, url)
    local s
    if raw then
      s = unpack_state(raw)
      revisited = revisited + 1
    else
      s = {v = 0, c = 0, t0 = now_s, t1 = now_s, ivl = 0, cap = 0, dig = '-', score = score,
           etag = '-', lm = '-'}
      first = first + 1
    end
    local changed
    if s.v == 0 then
      changed = -1
    elseif kind == '304' or (digest ~= '' and digest == s.dig) then
      changed = 0
    else
      changed = 1
      s.c = s.c + 1
    end
    s.v = s.v + 1
    s.t1 = now_s
    s.score = score
    if kind ~= '304' and changed ~= 0 then
      s.cap = now_s
      s.dig = digest ~= '' and digest or '-'
    end
    if etag ~= '' then s.etag = etag elseif kind ~= '304' then s.etag = '-' end
    if lm ~= '' then s.lm = lm elseif kind ~= '304' then s.lm = '-' end
    local h = redis.call('HMGET', hk, 'rv_n', 'rv_load', 'rv_mu', 'admitted')
    local pages = tonumber(h[1] or '0')
    if changed == -1 then pages = pages + 1 end
    local load = tonumber(h[2] or '0')
    local old = s.ivl
    if old > 0 then load = load - DAY / old end
    -- the host's uniform interval: its pages (those admitted, when more) over its budget
    local uniform = clamp(math.max(pages, tonumber(h[4] or '0')) * DAY / budget, lo, hi)
    local mu = tonumber(h[3] or '') or (1 - 2 / math.exp(1)) * uniform
    local interval
    local intervals = s.v - 1
    if intervals < 1 or s.t1 <= s.t0 then
      interval = uniform  -- nothing known yet: the host's uniform interval
    else
      local rate = -math.log((intervals - s.c + 0.5) / (intervals + 0.5)) /
                   ((s.t1 - s.t0) / intervals)
      local y = mu * rate
      if rate <= 0 or y >= 1 then
        interval = hi
      else
        interval = solve_g(y) / rate
      end
    end
    interval = clamp(interval, lo, hi)
    if old > 0 then interval = math.min(interval, 2 * old) end
    interval = math.max(1, math.floor(interval + 0.5))
    s.ivl = interval
    load = math.max(0, load + DAY / interval)
    mu = clamp(mu * (load / budget) ^ (1 / pages), 1e-3, 1e10)
    redis.call('HSET', hk, 'rv_n', pages, 'rv_load', tostring(load), 'rv_mu', tostring(mu))
    redis.call('HSET', sk, url, pack_state(s))
    redis.call('ZADD', KEYS[2], now + interval * 1000, host .. ' ' .. url)
    out[#out + 1] = {changed, interval}
  end
  if first > 0 then redis.call('HINCRBY', KEYS[1], 'rv_tracked', first) end
  if revisited > 0 then redis.call('HINCRBY', KEYS[1], 'rv_pending', -revisited) end
  return out
end

local S = {due = KEYS[3], ready = KEYS[4], prio = KEYS[5], touched = KEYS[6]}
local count = 0
local touched = {}
for i = 0, n - 1 do
  local hk, sk, hot, cold = KEYS[7 + 4 * i], KEYS[8 + 4 * i], KEYS[9 + 4 * i], KEYS[10 + 4 * i]
  local host, url, lastmod = ARGV[a], ARGV[a + 1], ARGV[a + 2]
  a = a + (op == 'sooner' and 3 or 2)
  local member = host .. ' ' .. url
  local raw = redis.call('HGET', sk, url)
  if op == 'release' then
    local at = redis.call('ZSCORE', KEYS[2], member)
    if at and tonumber(at) <= now then
      if not raw then
        redis.call('ZREM', KEYS[2], member)
      elseif redis.call('HGET', hk, 'state') == 'blocked' then
        redis.call('ZADD', KEYS[2], now + hi * 1000, member)
      else
        redis.call('ZREM', KEYS[2], member)
        push_url(hot, cold, url, unpack_state(raw).score, cap)
        count = count + 1
        if not touched[host] then
          touched[host] = true
          touched[#touched + 1] = {host, hk, hot, cold}
        end
      end
    end
  elseif op == 'drop' and raw then
    local s = unpack_state(raw)
    redis.call('HDEL', sk, url)
    redis.call('ZREM', KEYS[2], member)
    local h = redis.call('HMGET', hk, 'rv_n', 'rv_load')
    local load = tonumber(h[2] or '0')
    if s.ivl > 0 then load = math.max(0, load - DAY / s.ivl) end
    redis.call('HSET', hk, 'rv_n', math.max(0, tonumber(h[1] or '1') - 1), 'rv_load', tostring(load))
    count = count + 1
  elseif op == 'sooner' and raw then
    local at = redis.call('ZSCORE', KEYS[2], member)
    local t1, changed_at = unpack_state(raw).t1, tonumber(lastmod)
    if at and changed_at and changed_at > t1 then
      local due = math.max(now, (t1 + lo) * 1000)
      if due < tonumber(at) then
        redis.call('ZADD', KEYS[2], due, member)
        count = count + 1
      end
    end
  end
end
if op == 'release' and count > 0 then
  redis.call('HINCRBY', KEYS[1], 'admitted', count)
  redis.call('HINCRBY', KEYS[1], 'queued', count)
  redis.call('HINCRBY', KEYS[1], 'rv_pending', count)
  redis.call('HINCRBY', KEYS[1], 'rv_released', count)
  for _, t in ipairs(touched) do
    schedule(S, t[1], t[2], t[3], t[4], cap, now)
  end
elseif op == 'drop' and count > 0 then
  redis.call('HINCRBY', KEYS[1], 'rv_tracked', -count)
  redis.call('HINCRBY', KEYS[1], 'rv_pending', -count)
end
return count
