-- Record how job ARGV[1] ended, take it off its model's active set, and let its record
-- expire after the retention time.
-- KEYS: job hash, the model's active set (under {jobs})
-- ARGV: job id, retention in seconds, field, value, ...
redis.call('HSET', KEYS[1], unpack(ARGV, 3))
redis.call('SREM', KEYS[2], ARGV[1])
redis.call('EXPIRE', KEYS[1], ARGV[2])
return 'ok'
