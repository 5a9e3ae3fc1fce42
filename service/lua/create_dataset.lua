-- Create a dataset's hash with its expiry, unless an earlier send of the same request
-- (the same id) created it.
-- KEYS: dataset hash
-- ARGV: life in seconds, field, value, ...
-- Returns "ok" | "existing"
if redis.call('EXISTS', KEYS[1]) == 1 then
  -- Written again so that this call replicates: a WAIT after it covers the first one.
  redis.call('HSET', KEYS[1], 'id', redis.call('HGET', KEYS[1], 'id'))
  return 'existing'
end
redis.call('HSET', KEYS[1], unpack(ARGV, 2))
redis.call('EXPIRE', KEYS[1], ARGV[1])
return 'ok'
