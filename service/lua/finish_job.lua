-- Record how job ARGV[1] ended and take it off its model's active set.
-- KEYS: job hash, the model's active set (under {jobs})
-- ARGV: job id, field, value, ...
redis.call('HSET', KEYS[1], unpack(ARGV, 2))
redis.call('SREM', KEYS[2], ARGV[1])
return 'ok'
