-- Create a dataset's hash with its expiry, unless an earlier send of the same request
-- (the same id) created it.
-- KEYS: dataset hash
-- ARGV: life in seconds, field, value, ... (field "request": the request's fingerprint)
-- Returns "ok" | "existing" | "reused" (the same id from another request)
if redis.call('EXISTS', KEYS[1]) == 1 then
  local seen = redis.call('HGET', KEYS[1], 'request')
  local sent = ''
  for i = 2, #ARGV - 1, 2 do
    if ARGV[i] == 'request' then sent = ARGV[i + 1] end
  end
  if seen and seen ~= '' and seen ~= sent then
    return 'reused'
  end
  -- Written again so that this call replicates: a WAIT after it covers the first one.
  redis.call('HSET', KEYS[1], 'id', redis.call('HGET', KEYS[1], 'id'))
  return 'existing'
end
redis.call('HSET', KEYS[1], unpack(ARGV, 2))
redis.call('EXPIRE', KEYS[1], ARGV[1])
return 'ok'
