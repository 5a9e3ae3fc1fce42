-- Record how job ARGV[1] ended, take it off its model's active set, and let its record
-- expire after the retention time. A final state is final; a worker ends only a job
-- whose stream entry it still holds (another may have taken it over).
-- KEYS: job hash, the model's active set, jobs stream (all under {jobs})
-- ARGV: job id, retention in seconds, the worker's stream entry, consumer group,
--       consumer, field, value, ...
-- Returns {"ok"} | {"final", state} | {"lost"}
local state = redis.call('HGET', KEYS[1], 'state')
if state == 'succeeded' or state == 'failed' or state == 'cancelled' then
  return {'final', state}
end
local pending = redis.call('XPENDING', KEYS[3], ARGV[4], ARGV[3], ARGV[3], 1)
if #pending == 0 or pending[1][2] ~= ARGV[5] then
  return {'lost'}
end
redis.call('HSET', KEYS[1], unpack(ARGV, 6))
redis.call('SREM', KEYS[2], ARGV[1])
redis.call('EXPIRE', KEYS[1], ARGV[2])
return {'ok'}
