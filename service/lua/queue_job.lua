-- Queue fit job ARGV[1], unless its request key already queued one or the model has the
-- most jobs it may have queued or running.
-- KEYS: job hash, recent jobs sorted set, the model's active set, jobs stream,
--       request key (all under {jobs})
-- ARGV: job id, now (seconds), jobs kept in the recent index, most active jobs,
--       request key's life in seconds ("" without a request key), the request's
--       fingerprint, field, value, ...
-- The request key holds "<job id> <fingerprint>" (only the job id before 2026-12).
-- Returns {"queued"} | {"existing", job id} | {"full", active jobs} | {"reused"}
if ARGV[5] ~= '' then
  local existing = redis.call('GET', KEYS[5])
  if existing then
    local job, seen = string.match(existing, '^(%S+) ?(%S*)$')
    if seen ~= '' and seen ~= ARGV[6] then
      return {'reused'}
    end
    -- Written again so that this call replicates: a WAIT after it covers the first one.
    redis.call('SET', KEYS[5], existing, 'KEEPTTL')
    return {'existing', job}
  end
end
local active = redis.call('SCARD', KEYS[3])
if active >= tonumber(ARGV[4]) then
  return {'full', active}
end
redis.call('HSET', KEYS[1], unpack(ARGV, 7))
redis.call('ZADD', KEYS[2], ARGV[2], ARGV[1])
redis.call('ZREMRANGEBYRANK', KEYS[2], 0, -tonumber(ARGV[3]) - 1)
redis.call('SADD', KEYS[3], ARGV[1])
redis.call('XADD', KEYS[4], '*', 'job', ARGV[1])
if ARGV[5] ~= '' then
  redis.call('SET', KEYS[5], ARGV[1] .. ' ' .. ARGV[6], 'EX', ARGV[5])
end
return {'queued'}
