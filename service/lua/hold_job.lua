-- A worker's hold on the stream entry ARGV[1] of a job: kept (its idle time reset) only
-- while the entry is pending in its own name, for a takeover must not be taken back.
-- KEYS: jobs stream, job hash (under {jobs})
-- ARGV: stream entry, consumer group, consumer, then one of
--       "beat" [progress]: reset the idle time, store the progress
--       "start" now: mark the job running, count this run
--       "hand back" job id: queue the job again (a new entry) and drop this one
-- Returns {"ours", value} (beat: the cancel flag or ""; start: the run's number) |
--         {"final", state} | {"lost"}
local pending = redis.call('XPENDING', KEYS[1], ARGV[2], ARGV[1], ARGV[1], 1)
if #pending == 0 or pending[1][2] ~= ARGV[3] then
  return {'lost'}
end
local state = redis.call('HGET', KEYS[2], 'state')
if state == 'succeeded' or state == 'failed' or state == 'cancelled' then
  return {'final', state}
end
if ARGV[4] == 'beat' then
  redis.call('XCLAIM', KEYS[1], ARGV[2], ARGV[3], 0, ARGV[1], 'JUSTID')
  if ARGV[5] then
    redis.call('HSET', KEYS[2], 'progress', ARGV[5])
  end
  return {'ours', redis.call('HGET', KEYS[2], 'cancel') or ''}
end
if ARGV[4] == 'start' then
  local run = redis.call('HINCRBY', KEYS[2], 'attempts', 1)
  redis.call('HSET', KEYS[2], 'state', 'running', 'started_at', ARGV[5])
  return {'ours', run}
end
redis.call('HSET', KEYS[2], 'state', 'queued')
redis.call('XADD', KEYS[1], '*', 'job', ARGV[5])
redis.call('XACK', KEYS[1], ARGV[2], ARGV[1])
redis.call('XDEL', KEYS[1], ARGV[1])
return {'ours', ''}
