-- Write version ARGV[1] of a model, if it is the next number, and update the model.
-- A writer (a fit job, an import's request key) writes at most one version: a repeat
-- gets the first one's number.
-- KEYS: model hash, versions sorted set, version hash, writers hash (one hash tag)
-- ARGV: number, dimension, serve ("1"/"0"), now, name, events channel, writer or "",
--       the request's fingerprint or "" (kept as the writer's "<writer>:request"),
--       field, value, ...
-- Returns {"ok", number, serving} | {"retry"} (another writer took the number)
--       | {"dimension", d} | {"reused"} (the writer's request was another)
if ARGV[7] ~= '' then
  local written = redis.call('HGET', KEYS[4], ARGV[7])
  if written then
    local seen = redis.call('HGET', KEYS[4], ARGV[7] .. ':request')
    if seen and seen ~= ARGV[8] then
      return {'reused'}
    end
    -- Written again so that this call replicates: a WAIT after it covers the first write.
    redis.call('HSET', KEYS[4], ARGV[7], written)
    return {'ok', written, redis.call('HGET', KEYS[1], 'serving')}
  end
end
local latest = tonumber(redis.call('HGET', KEYS[1], 'latest') or '0')
if latest + 1 ~= tonumber(ARGV[1]) then
  return {'retry'}
end
local dimension = redis.call('HGET', KEYS[1], 'dimension')
if dimension and dimension ~= ARGV[2] then
  return {'dimension', dimension}
end
redis.call('HSET', KEYS[3], unpack(ARGV, 9))
if ARGV[7] ~= '' then
  redis.call('HSET', KEYS[4], ARGV[7], ARGV[1])
  if ARGV[8] ~= '' then
    redis.call('HSET', KEYS[4], ARGV[7] .. ':request', ARGV[8])
  end
end
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
return {'ok', ARGV[1], serving}
