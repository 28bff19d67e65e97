package redisjobs

import "github.com/redis/go-redis/v9"

// The scripts every change of a job goes through. A job's hash holds
// state, epoch (how many times a sidecar took it), owner (the sidecar
// that took it last), entry (its stream entry), status (the JSON the API
// shows), updated (unix ms) and finished (how many times it finished).
// Every write of the sidecar running a job names the epoch it took the job
// at, and lands only while the job is still running at that epoch: a
// sidecar that lost its claim (paused or cut off past its lease, then
// back) finds its writes refused.

// submitScript queues a job.
// KEYS: queue, jobs, job. ARGV: id, created (unix ms), status.
var submitScript = redis.NewScript(`
redis.call('HSET', KEYS[3], 'status', ARGV[3], 'state', 'queued', 'epoch', 0, 'updated', ARGV[2], 'finished', 0)
redis.call('ZADD', KEYS[2], ARGV[2], ARGV[1])
redis.call('XADD', KEYS[1], '*', 'id', ARGV[1])
return 1
`)

// takeScript makes a claimed stream entry the job's run at a new epoch,
// or acknowledges and drops an entry whose job has ended (finished or
// canceled meanwhile) and returns 0.
// KEYS: queue, job. ARGV: group, consumer, entry, now (unix ms).
var takeScript = redis.NewScript(`
local state = redis.call('HGET', KEYS[2], 'state')
if state ~= 'queued' and state ~= 'running' then
  redis.call('XACK', KEYS[1], ARGV[1], ARGV[3])
  redis.call('XDEL', KEYS[1], ARGV[3])
  return 0
end
redis.call('XCLAIM', KEYS[1], ARGV[1], ARGV[2], 0, ARGV[3], 'JUSTID')
local epoch = redis.call('HINCRBY', KEYS[2], 'epoch', 1)
redis.call('HSET', KEYS[2], 'state', 'running', 'owner', ARGV[2], 'entry', ARGV[3], 'updated', ARGV[4])
return epoch
`)

// heartbeatScript extends the claim of the job's run at epoch (it resets
// the stream entry's idle time, which XAUTOCLAIM measures the lease by)
// and stores its status. It answers "ok", "canceled" (the entry is then
// acknowledged) or "lost".
// KEYS: queue, job. ARGV: group, consumer, entry, epoch, status ("" for
// none), now.
var heartbeatScript = redis.NewScript(`
if redis.call('HGET', KEYS[2], 'epoch') ~= ARGV[4] then return 'lost' end
local state = redis.call('HGET', KEYS[2], 'state')
if state == 'canceled' then
  redis.call('XACK', KEYS[1], ARGV[1], ARGV[3])
  redis.call('XDEL', KEYS[1], ARGV[3])
  return 'canceled'
end
if state ~= 'running' then return 'lost' end
redis.call('XCLAIM', KEYS[1], ARGV[1], ARGV[2], 0, ARGV[3], 'JUSTID')
if ARGV[5] ~= '' then
  redis.call('HSET', KEYS[2], 'status', ARGV[5], 'updated', ARGV[6])
end
return 'ok'
`)

// checkpointScript stores the checkpoint of the job's run at epoch; 0
// when the run lost its claim.
// KEYS: job, checkpoint. ARGV: epoch, data, step.
var checkpointScript = redis.NewScript(`
if redis.call('HGET', KEYS[1], 'epoch') ~= ARGV[1] or redis.call('HGET', KEYS[1], 'state') ~= 'running' then
  return 0
end
redis.call('HSET', KEYS[2], 'data', ARGV[2], 'step', ARGV[3], 'epoch', ARGV[1])
return 1
`)

// finishScript ends the job's run at epoch: its state (done or failed),
// status and outputs, its entry acknowledged, its checkpoint dropped; 0
// when the run lost its claim. A retry after a reply that was lost finds
// the end stored and answers 1 again.
// KEYS: queue, job, outputs, checkpoint. ARGV: group, entry, epoch, state,
// status, now, then name and content of each output.
var finishScript = redis.NewScript(`
if redis.call('HGET', KEYS[2], 'epoch') ~= ARGV[3] then return 0 end
local state = redis.call('HGET', KEYS[2], 'state')
if state == ARGV[4] and redis.call('HGET', KEYS[2], 'status') == ARGV[5] then return 1 end
if state ~= 'running' then return 0 end
redis.call('HSET', KEYS[2], 'state', ARGV[4], 'status', ARGV[5], 'updated', ARGV[6])
redis.call('HINCRBY', KEYS[2], 'finished', 1)
for i = 7, #ARGV, 2 do
  redis.call('HSET', KEYS[3], ARGV[i], ARGV[i + 1])
end
redis.call('DEL', KEYS[4])
redis.call('XACK', KEYS[1], ARGV[1], ARGV[2])
redis.call('XDEL', KEYS[1], ARGV[2])
return 1
`)

// releaseScript hands the job's run at epoch back to the queue (a sidecar
// shutting down): queued again under a new entry, so another sidecar
// takes it at once and resumes it from its checkpoint; 0 when the run had
// lost its claim anyway.
// KEYS: queue, job. ARGV: group, entry, epoch, status, now, id.
var releaseScript = redis.NewScript(`
if redis.call('HGET', KEYS[2], 'epoch') ~= ARGV[3] or redis.call('HGET', KEYS[2], 'state') ~= 'running' then
  return 0
end
redis.call('HSET', KEYS[2], 'state', 'queued', 'status', ARGV[4], 'updated', ARGV[5], 'entry', '')
redis.call('XACK', KEYS[1], ARGV[1], ARGV[2])
redis.call('XDEL', KEYS[1], ARGV[2])
redis.call('XADD', KEYS[1], '*', 'id', ARGV[6])
return 1
`)

// cancelScript marks a queued or running job canceled (the sidecar running
// it sees that at its next heartbeat) and returns the state it found;
// nil for an unknown job.
// KEYS: job. ARGV: now.
var cancelScript = redis.NewScript(`
local state = redis.call('HGET', KEYS[1], 'state')
if not state then return false end
if state == 'queued' or state == 'running' then
  redis.call('HSET', KEYS[1], 'state', 'canceled', 'updated', ARGV[1])
end
return state
`)
