package runs

import "github.com/redis/go-redis/v9"

// Every script but the quota scripts works on the five keys of one run,
// all in one hash slot:
//
//	KEYS[1] m  hash: seq (last Seq = calls), up, cost, saved, keys, bodies,
//	           bytes, stored (integers), first, last (sortable times, see
//	           sortTime)
//	KEYS[2] o  hash: request key -> occurrences recorded
//	KEYS[3] x  hash: occurrence .. ':' .. request key -> Seq
//	KEYS[4] e  hash: Seq (decimal) -> record (encodeRecord)
//	KEYS[5] b  hash: ref (32 raw bytes) -> body, or for a body Import wrote
//	           in chunks, ref .. chunk number (4 bytes, big-endian, from 0)
//	           -> chunk
//
// Figures go to Redis as decimal strings and are summed by HINCRBY, which
// works in 64-bit integers; Seq and occurrences come back from HINCRBY and
// stay far below 2^53, so Lua's doubles hold them exactly. A run written
// before "stored" was kept lacks it; its Stored is then taken as "bytes".

// recordScript appends one call: it assigns Seq and the occurrence, writes
// them into the record at their fixed offsets, stores the body if the run
// lacks it, and updates the figures.
//
//	ARGV: key, raw ref, body, record (Seq and occurrence zero),
//	      upstream ("1" or "0"), cost, saved, time (sortTime), entry
//	      bytes (entryBytes)
//	returns {seq, occurrence, 1 if the body was new else 0}
var recordScript = redis.NewScript(`
local seq = redis.call('HINCRBY', KEYS[1], 'seq', 1)
local occ = redis.call('HINCRBY', KEYS[2], ARGV[1], 1)
local rec = string.sub(ARGV[4], 1, 1) .. struct.pack('>I8>I8', seq, occ) .. string.sub(ARGV[4], 18)
redis.call('HSET', KEYS[4], string.format('%d', seq), rec)
redis.call('HSET', KEYS[3], string.format('%d', occ) .. ':' .. ARGV[1], string.format('%d', seq))
local new = 0
if redis.call('HEXISTS', KEYS[5], ARGV[2]) == 0 and redis.call('HEXISTS', KEYS[5], ARGV[2] .. '\0\0\0\0') == 0 then
  redis.call('HSET', KEYS[5], ARGV[2], ARGV[3])
  redis.call('HINCRBY', KEYS[1], 'bodies', 1)
  redis.call('HINCRBY', KEYS[1], 'bytes', string.len(ARGV[3]))
  redis.call('HINCRBY', KEYS[1], 'stored', string.len(ARGV[3]))
  new = 1
end
redis.call('HINCRBY', KEYS[1], 'stored', ARGV[9])
if occ == 1 then redis.call('HINCRBY', KEYS[1], 'keys', 1) end
if ARGV[5] == '1' then redis.call('HINCRBY', KEYS[1], 'up', 1) end
redis.call('HINCRBY', KEYS[1], 'cost', ARGV[6])
redis.call('HINCRBY', KEYS[1], 'saved', ARGV[7])
local f = redis.call('HGET', KEYS[1], 'first')
if not f or ARGV[8] < f then redis.call('HSET', KEYS[1], 'first', ARGV[8]) end
local l = redis.call('HGET', KEYS[1], 'last')
if not l or ARGV[8] > l then redis.call('HSET', KEYS[1], 'last', ARGV[8]) end
return {seq, occ, new}
`)

// bodyLua defines body(key, ref), the body of ref in the b hash key:
// whole, or joined from its chunks (false if the run lacks it). It starts
// the scripts that return bodies.
const bodyLua = `
local function body(key, ref)
  local b = redis.call('HGET', key, ref)
  if b then return b end
  local parts, i = {}, 0
  while true do
    local c = redis.call('HGET', key, ref .. struct.pack('>I4', i))
    if not c then break end
    i = i + 1
    parts[i] = c
  end
  if i == 0 then return false end
  return table.concat(parts)
end
`

// lookupScript finds the occurrence-th call with a key and its body.
//
//	ARGV: key, occurrence (decimal)
//	returns {0} no such run, {1, have} no such call,
//	        {2, seq} entry missing, {3, record} body missing,
//	        {4, record, body} found
var lookupScript = redis.NewScript(bodyLua + `
local seq = redis.call('HGET', KEYS[3], ARGV[2] .. ':' .. ARGV[1])
if not seq then
  if redis.call('EXISTS', KEYS[1]) == 0 then return {0} end
  return {1, redis.call('HGET', KEYS[2], ARGV[1]) or '0'}
end
local rec = redis.call('HGET', KEYS[4], seq)
if not rec then return {2, seq} end
local b = body(KEYS[5], string.sub(rec, 18, 49))
if not b then return {3, rec} end
return {4, rec, b}
`)

// deleteScript removes a run's keys and returns {1 if it existed, what it
// held (stored, else bytes)}.
var deleteScript = redis.NewScript(`
local existed = redis.call('EXISTS', KEYS[1])
local held = redis.call('HGET', KEYS[1], 'stored') or redis.call('HGET', KEYS[1], 'bytes') or '0'
redis.call('DEL', unpack(KEYS))
return {existed, tonumber(held)}
`)

// commitImportScript makes a staged import the run: KEYS are the run's
// five keys, then the five staged ones.
//
//	ARGV: replace ("1" or "0")
//	returns {0} if the run exists and replace is "0" (nothing changed),
//	        else {1, what the replaced run held (0 for none)}
var commitImportScript = redis.NewScript(`
local exists = redis.call('EXISTS', KEYS[1]) == 1
if exists and ARGV[1] ~= '1' then return {0} end
local held = 0
if exists then
  held = tonumber(redis.call('HGET', KEYS[1], 'stored') or redis.call('HGET', KEYS[1], 'bytes') or '0')
end
redis.call('DEL', KEYS[1], KEYS[2], KEYS[3], KEYS[4], KEYS[5])
for i = 1, 5 do
  if redis.call('EXISTS', KEYS[5 + i]) == 1 then
    redis.call('RENAME', KEYS[5 + i], KEYS[i])
    redis.call('PERSIST', KEYS[i])
  end
end
return {1, held}
`)

// The quota scripts work on a team's usage hash, in the team's own slot:
//
//	used        what the team's runs hold (absent until first counted,
//	            see RedisJournal.usage)
//	h:<nonce>   what an import in progress reserves: "<bytes>:<expiry, Unix ms>"
//
// holdsLua sums the live reservations and drops expired ones (an import
// whose process died); ARGV[1] is the current time in Unix ms.
const holdsLua = `
local function holds(key, now, skip)
  local held, all = 0, redis.call('HGETALL', key)
  for i = 1, #all, 2 do
    local f = all[i]
    if string.sub(f, 1, 2) == 'h:' and f ~= skip then
      local v = all[i + 1]
      local sep = string.find(v, ':', 1, true)
      if tonumber(string.sub(v, sep + 1)) < now then
        redis.call('HDEL', key, f)
      else
        held = held + tonumber(string.sub(v, 1, sep - 1))
      end
    end
  end
  return held
end
`

// reserveScript admits need more bytes for the team: counted as used at
// once (a Record), or reserved under a hold until the import commits.
//
//	ARGV: now (Unix ms), quota (0: none), need, hold id ("" for none),
//	      hold expiry (Unix ms)
//	returns {-1} when used is not counted yet, {0, used + held} when need
//	does not fit, else {1}
var reserveScript = redis.NewScript(holdsLua + `
local used = redis.call('HGET', KEYS[1], 'used')
if not used then return {-1} end
local held = holds(KEYS[1], tonumber(ARGV[1]), 'h:' .. ARGV[4])
local quota, need = tonumber(ARGV[2]), tonumber(ARGV[3])
if quota > 0 and need > 0 and tonumber(used) + held + need > quota then return {0, tonumber(used) + held} end
if ARGV[4] == '' then
  redis.call('HINCRBY', KEYS[1], 'used', ARGV[3])
else
  redis.call('HSET', KEYS[1], 'h:' .. ARGV[4], ARGV[3] .. ':' .. ARGV[5])
end
return {1}
`)

// settleScript ends an import's hold and counts what the import adds
// (delta, negative when it replaced a larger run), if it fits.
//
//	ARGV: now (Unix ms), quota (0: none), delta, hold id
//	returns {-1} when used is not counted, {0, used + held} when delta does
//	not fit (the hold is gone either way), else {1}
var settleScript = redis.NewScript(holdsLua + `
redis.call('HDEL', KEYS[1], 'h:' .. ARGV[4])
local used = redis.call('HGET', KEYS[1], 'used')
if not used then return {-1} end
local held = holds(KEYS[1], tonumber(ARGV[1]), '')
local quota, delta = tonumber(ARGV[2]), tonumber(ARGV[3])
if quota > 0 and delta > 0 and tonumber(used) + held + delta > quota then return {0, tonumber(used) + held} end
redis.call('HINCRBY', KEYS[1], 'used', ARGV[3])
return {1}
`)

// adjustScript adds delta to what the team's runs hold, never below 0.
//
//	ARGV: delta
//	returns {-1} when used is not counted, else {1}
var adjustScript = redis.NewScript(`
if not redis.call('HGET', KEYS[1], 'used') then return {-1} end
if redis.call('HINCRBY', KEYS[1], 'used', ARGV[1]) < 0 then redis.call('HSET', KEYS[1], 'used', 0) end
return {1}
`)
