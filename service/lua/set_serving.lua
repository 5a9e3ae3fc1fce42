-- Make version ARGV[1] the serving one.
-- KEYS: model hash, versions sorted set
-- ARGV: number, now, name, events channel
-- Returns {"ok", previous serving or ""} | {"missing"}
if not redis.call('ZSCORE', KEYS[2], ARGV[1]) then
  return {'missing'}
end
local previous = redis.call('HGET', KEYS[1], 'serving') or ''
redis.call('HSET', KEYS[1], 'serving', ARGV[1], 'updated_at', ARGV[2])
redis.call('HINCRBY', KEYS[1], 'stamp', 1)
redis.call('PUBLISH', ARGV[4], ARGV[3])
return {'ok', previous}
