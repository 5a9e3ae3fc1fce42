-- Append a chunk of rows to a dataset, once per request key, and restart its expiry.
-- KEYS: dataset hash, chunks list, request keys hash (one hash tag)
-- ARGV: raw rows, row count, life in seconds, request key, most bytes of the dataset,
--       the request's fingerprint or "" (kept as "<request key>:request")
-- Returns "ok" | "missing" | {"full", bytes stored} | "reused"
if redis.call('EXISTS', KEYS[1]) == 0 then
  return 'missing'
end
local chunk = redis.call('HGET', KEYS[3], ARGV[4])
if chunk then
  local seen = redis.call('HGET', KEYS[3], ARGV[4] .. ':request')
  if seen and seen ~= ARGV[6] then
    return 'reused'
  end
end
local stored = tonumber(redis.call('HGET', KEYS[1], 'bytes'))
if not chunk and stored + string.len(ARGV[1]) > tonumber(ARGV[5]) then
  return {'full', stored}
end
if chunk then
  -- Written again so that this call replicates: a WAIT after it covers the first append.
  redis.call('HSET', KEYS[3], ARGV[4], chunk)
else
  redis.call('RPUSH', KEYS[2], ARGV[1])
  redis.call('HINCRBY', KEYS[1], 'rows', ARGV[2])
  redis.call('HINCRBY', KEYS[1], 'bytes', string.len(ARGV[1]))
  redis.call('HSET', KEYS[3], ARGV[4], redis.call('HINCRBY', KEYS[1], 'chunks', 1))
  if ARGV[6] ~= '' then
    redis.call('HSET', KEYS[3], ARGV[4] .. ':request', ARGV[6])
  end
end
for _, key in ipairs(KEYS) do
  redis.call('EXPIRE', key, ARGV[3])
end
return 'ok'
