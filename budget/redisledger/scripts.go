package redisledger

import "github.com/redis/go-redis/v9"

// Each script works on one "trio" of keys in a single hash slot:
//
//	KEYS[1] sums   hash: "s|"..field -> spent, "h|"..field -> held (Nanos)
//	KEYS[2] holds  hash: reservation id -> JSON record {a, d, f, l}; a
//	               limit below 0 marks a sum that is counted, not capped
//	KEYS[3] leases sorted set: reservation id scored by lease deadline (ms)
//
// Amounts are integers below 2^53, so Lua's doubles hold them exactly;
// they go back to Redis through string.format('%d') because Redis turns a
// Lua number argument into a string with %.17g, which would print large
// values in exponent form that HINCRBY rejects.

// reserveScript checks every capped sum, then holds the amount against all
// of them and records the reservation; it holds nothing if a cap refuses.
//
//	ARGV: id, amount, deadline_ms, record_json, nsums, {field, limit}...
//	      (limit below 0: counted, not capped)
//	returns {1, remaining} on success (remaining -1 when nothing is capped),
//	        or {0, index_of_refusing_sum (0-based), remaining_before}
var reserveScript = redis.NewScript(`
local amount = tonumber(ARGV[2])
local n = tonumber(ARGV[5])
for i = 0, n - 1 do
  local f = ARGV[6 + 2 * i]
  local lim = tonumber(ARGV[7 + 2 * i])
  if lim >= 0 then
    local s = tonumber(redis.call('HGET', KEYS[1], 's|' .. f) or '0')
    local h = tonumber(redis.call('HGET', KEYS[1], 'h|' .. f) or '0')
    if lim - s - h < amount then
      return {0, i, string.format('%d', lim - s - h)}
    end
  end
end
local rem = -1
for i = 0, n - 1 do
  local f = ARGV[6 + 2 * i]
  local lim = tonumber(ARGV[7 + 2 * i])
  local h = redis.call('HINCRBY', KEYS[1], 'h|' .. f, ARGV[2])
  if lim >= 0 then
    local s = tonumber(redis.call('HGET', KEYS[1], 's|' .. f) or '0')
    local left = lim - s - h
    if rem < 0 or left < rem then rem = left end
  end
end
redis.call('HSET', KEYS[2], ARGV[1], ARGV[4])
redis.call('ZADD', KEYS[3], ARGV[3], ARGV[1])
return {1, string.format('%d', rem)}
`)

// chargeLua moves a decoded record r's hold to spent as charged, deletes it
// and returns the least remaining budget (-1 without caps). Shared by the
// settle and expire scripts.
const chargeLua = `
local function charge(id, r, charged)
  local rem = -1
  for i, f in ipairs(r.f) do
    local s = redis.call('HINCRBY', KEYS[1], 's|' .. f, string.format('%d', charged))
    local h = redis.call('HINCRBY', KEYS[1], 'h|' .. f, string.format('%d', -r.a))
    if r.l[i] >= 0 then
      local left = r.l[i] - s - h
      if left < 0 then left = 0 end
      if rem < 0 or left < rem then rem = left end
    end
  end
  redis.call('HDEL', KEYS[2], id)
  redis.call('ZREM', KEYS[3], id)
  return rem
end
`

// settleScript charges a held reservation. Not held, it writes the time to
// the sums' "w" field: a write of its own, so that a WAIT after it
// confirms whatever settled the reservation before (see run).
//
//	ARGV: id, actual, now_ms
//	returns {0} if not held, else {1, charged, expired (0|1), remaining}
var settleScript = redis.NewScript(chargeLua + `
local raw = redis.call('HGET', KEYS[2], ARGV[1])
if not raw then
  redis.call('HSET', KEYS[1], 'w', ARGV[3])
  return {0}
end
local r = cjson.decode(raw)
local charged = tonumber(ARGV[2])
local expired = 0
if tonumber(ARGV[3]) >= r.d then
  expired = 1
  if charged < r.a then charged = r.a end
end
local rem = charge(ARGV[1], r, charged)
return {1, string.format('%d', charged), expired, string.format('%d', rem)}
`)

// releaseScript drops a hold without charging it. It undoes a global hold
// whose team reservation failed, before the lease deadline only.
//
//	ARGV: id, now_ms
//	returns 1 if released, 0 if not held or already past its deadline
var releaseScript = redis.NewScript(chargeLua + `
local raw = redis.call('HGET', KEYS[2], ARGV[1])
if not raw then return 0 end
local r = cjson.decode(raw)
if tonumber(ARGV[2]) >= r.d then return 0 end
charge(ARGV[1], r, 0)
return 1
`)

// expireScript charges up to ARGV[2] reservations whose deadline is not
// after ARGV[1] (ms) at their reserved amount, returning their records.
var expireScript = redis.NewScript(chargeLua + `
local ids = redis.call('ZRANGEBYSCORE', KEYS[3], '-inf', ARGV[1], 'LIMIT', 0, tonumber(ARGV[2]))
local out = {}
for _, id in ipairs(ids) do
  local raw = redis.call('HGET', KEYS[2], id)
  if raw then
    charge(id, cjson.decode(raw), cjson.decode(raw).a)
    table.insert(out, raw)
  else
    redis.call('ZREM', KEYS[3], id)
  end
end
return out
`)

// seedScript raises spent sums of the global trio to at least the given
// amounts (what the teams' own sums add up to), never lowering one.
//
//	ARGV: n, {field, amount}...
var seedScript = redis.NewScript(`
local n = tonumber(ARGV[1])
for i = 0, n - 1 do
  local f = 's|' .. ARGV[2 + 2 * i]
  local want = tonumber(ARGV[3 + 2 * i])
  local have = tonumber(redis.call('HGET', KEYS[1], f) or '0')
  if have < want then
    redis.call('HSET', KEYS[1], f, string.format('%d', want))
  end
end
return 1
`)
