-- Append tail fractions to a model version's drift window and keep only its last ones.
-- KEYS: the window (a string of little-endian float64 values, oldest first)
-- ARGV: packed values, most bytes kept (8 per value), life in seconds
-- Returns the bytes kept
local length = redis.call('APPEND', KEYS[1], ARGV[1])
local most = tonumber(ARGV[2])
if length > most then
  redis.call('SET', KEYS[1], string.sub(redis.call('GET', KEYS[1]), -most))
  length = most
end
redis.call('EXPIRE', KEYS[1], ARGV[3])
return length
