-- Write version ARGV[1] of a model, if it is the next number, and update the model.
-- KEYS: model hash, versions sorted set, version hash (all under the model's hash tag)
-- ARGV: number, dimension, serve ("1"/"0"), now, name, events channel, field, value, ...
-- Returns {"ok", serving} | {"retry"} (another writer took the number) | {"dimension", d}
local latest = tonumber(redis.call('HGET', KEYS[1], 'latest') or '0')
if latest + 1 ~= tonumber(ARGV[1]) then
  return {'retry'}
end
local dimension = redis.call('HGET', KEYS[1], 'dimension')
if dimension and dimension ~= ARGV[2] then
  return {'dimension', dimension}
end
redis.call('HSET', KEYS[3], unpack(ARGV, 7))
redis.call('ZADD', KEYS[2], ARGV[1], ARGV[1])
if not dimension then
  redis.call('HSET', KEYS[1], 'name', ARGV[5], 'dimension', ARGV[2], 'created_at', ARGV[4])
end
redis.call('HSET', KEYS[1], 'latest', ARGV[1], 'updated_at', ARGV[4])
local serving = redis.call('HGET', KEYS[1], 'serving')
if (not serving) or ARGV[3] == '1' then
  serving = ARGV[1]
  redis.call('HSET', KEYS[1], 'serving', serving)
  redis.call('HINCRBY', KEYS[1], 'stamp', 1)
  redis.call('PUBLISH', ARGV[6], ARGV[5])
end
return {'ok', serving}
