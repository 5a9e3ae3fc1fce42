-- Create a dataset's hash with its expiry.
-- KEYS: dataset hash
-- ARGV: life in seconds, field, value, ...
redis.call('HSET', KEYS[1], unpack(ARGV, 2))
redis.call('EXPIRE', KEYS[1], ARGV[1])
return 'ok'
