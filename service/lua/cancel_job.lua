-- Cancel job ARGV[1]: at once if it is queued, else ask its worker to stop.
-- KEYS: job hash, the model's active set (under {jobs})
-- ARGV: job id, retention in seconds, now
-- Returns {"cancelled"} | {"asked"} | {"final", state} | {"missing"}
local state = redis.call('HGET', KEYS[1], 'state')
if not state then
  return {'missing'}
end
if state == 'succeeded' or state == 'failed' or state == 'cancelled' then
  return {'final', state}
end
redis.call('HSET', KEYS[1], 'cancel', 1)
if state ~= 'queued' then
  return {'asked'}
end
redis.call('HSET', KEYS[1], 'state', 'cancelled', 'finished_at', ARGV[3])
redis.call('SREM', KEYS[2], ARGV[1])
redis.call('EXPIRE', KEYS[1], ARGV[2])
return {'cancelled'}
