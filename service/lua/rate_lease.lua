-- A lease of requests from one key's one-second window: add the lease to the window's
-- count and grant what still fits under the limit (0 once the window is spent).
-- KEYS[1]: the window's counter; ARGV: lease, limit, counter lifetime in ms.
local lease = tonumber(ARGV[1])
local limit = tonumber(ARGV[2])
local used = redis.call('INCRBY', KEYS[1], lease)
if used == lease then
  redis.call('PEXPIRE', KEYS[1], ARGV[3])
end
local before = used - lease
if before >= limit then
  return 0
end
return math.min(lease, limit - before)
