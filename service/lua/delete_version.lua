-- Delete version ARGV[1] unless it is serving.
-- KEYS: model hash, versions sorted set, version hash
-- ARGV: number, now, name, events channel
-- Returns {"ok"} | {"missing"} | {"serving"}
if not redis.call('ZSCORE', KEYS[2], ARGV[1]) then
  return {'missing'}
end
if redis.call('HGET', KEYS[1], 'serving') == ARGV[1] then
  return {'serving'}
end
redis.call('DEL', KEYS[3])
redis.call('ZREM', KEYS[2], ARGV[1])
redis.call('HSET', KEYS[1], 'updated_at', ARGV[2])
redis.call('HINCRBY', KEYS[1], 'stamp', 1)
redis.call('PUBLISH', ARGV[4], ARGV[3])
return {'ok'}
