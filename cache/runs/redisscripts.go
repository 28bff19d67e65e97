package runs

import "github.com/redis/go-redis/v9"

// Every script works on the five keys of one run, all in one hash slot:
//
//	KEYS[1] m  hash: seq (last Seq = calls), up, cost, saved, keys, bodies,
//	           bytes (integers), first, last (sortable times, see sortTime)
//	KEYS[2] o  hash: request key -> occurrences recorded
//	KEYS[3] x  hash: occurrence .. ':' .. request key -> Seq
//	KEYS[4] e  hash: Seq (decimal) -> record (encodeRecord)
//	KEYS[5] b  hash: ref (32 raw bytes) -> body
//
// Figures go to Redis as decimal strings and are summed by HINCRBY, which
// works in 64-bit integers; Seq and occurrences come back from HINCRBY and
// stay far below 2^53, so Lua's doubles hold them exactly.

// recordScript appends one call: it assigns Seq and the occurrence, writes
// them into the record at their fixed offsets, stores the body if the run
// lacks it, and updates the figures.
//
//	ARGV: key, raw ref, body, record (Seq and occurrence zero),
//	      upstream ("1" or "0"), cost, saved, time (sortTime)
//	returns {seq, occurrence}
var recordScript = redis.NewScript(`
local seq = redis.call('HINCRBY', KEYS[1], 'seq', 1)
local occ = redis.call('HINCRBY', KEYS[2], ARGV[1], 1)
local rec = string.sub(ARGV[4], 1, 1) .. struct.pack('>I8>I8', seq, occ) .. string.sub(ARGV[4], 18)
redis.call('HSET', KEYS[4], string.format('%d', seq), rec)
redis.call('HSET', KEYS[3], string.format('%d', occ) .. ':' .. ARGV[1], string.format('%d', seq))
if redis.call('HSETNX', KEYS[5], ARGV[2], ARGV[3]) == 1 then
  redis.call('HINCRBY', KEYS[1], 'bodies', 1)
  redis.call('HINCRBY', KEYS[1], 'bytes', string.len(ARGV[3]))
end
if occ == 1 then redis.call('HINCRBY', KEYS[1], 'keys', 1) end
if ARGV[5] == '1' then redis.call('HINCRBY', KEYS[1], 'up', 1) end
redis.call('HINCRBY', KEYS[1], 'cost', ARGV[6])
redis.call('HINCRBY', KEYS[1], 'saved', ARGV[7])
local f = redis.call('HGET', KEYS[1], 'first')
if not f or ARGV[8] < f then redis.call('HSET', KEYS[1], 'first', ARGV[8]) end
local l = redis.call('HGET', KEYS[1], 'last')
if not l or ARGV[8] > l then redis.call('HSET', KEYS[1], 'last', ARGV[8]) end
return {seq, occ}
`)

// lookupScript finds the occurrence-th call with a key and its body.
//
//	ARGV: key, occurrence (decimal)
//	returns {0} no such run, {1, have} no such call,
//	        {2, seq} entry missing, {3, record} body missing,
//	        {4, record, body} found
var lookupScript = redis.NewScript(`
local seq = redis.call('HGET', KEYS[3], ARGV[2] .. ':' .. ARGV[1])
if not seq then
  if redis.call('EXISTS', KEYS[1]) == 0 then return {0} end
  return {1, redis.call('HGET', KEYS[2], ARGV[1]) or '0'}
end
local rec = redis.call('HGET', KEYS[4], seq)
if not rec then return {2, seq} end
local body = redis.call('HGET', KEYS[5], string.sub(rec, 18, 49))
if not body then return {3, rec} end
return {4, rec, body}
`)

// deleteScript removes a run's keys and returns 1 if it existed.
var deleteScript = redis.NewScript(`
local existed = redis.call('EXISTS', KEYS[1])
redis.call('DEL', unpack(KEYS))
return existed
`)

// importScript writes a whole run, replacing what its keys held.
//
//	ARGV: replace ("1" or "0"), then for each of the five keys in order a
//	      count n and n field, value pairs
//	returns 0 if the run exists and replace is "0" (nothing written), else 1
var importScript = redis.NewScript(`
if ARGV[1] ~= '1' and redis.call('EXISTS', KEYS[1]) == 1 then return 0 end
redis.call('DEL', unpack(KEYS))
local p = 2
for i = 1, #KEYS do
  local n = tonumber(ARGV[p])
  p = p + 1
  local done = 0
  while done < n do
    local m = math.min(n - done, 200)
    local args = {}
    for k = 1, 2 * m do args[k] = ARGV[p + k - 1] end
    p = p + 2 * m
    redis.call('HSET', KEYS[i], unpack(args))
    done = done + m
  end
end
return 1
`)
