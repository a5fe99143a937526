-- Load script for bench/serve.py (wrk): cycles through pre-built POST bodies, one JSON object a
-- line in the file given as the first script argument; with no argument it sends wrk's default GET.
-- The Authorization header comes from wrk's -H. done() prints one line "RESULT {json}" that
-- bench/serve.py reads: requests/s, latency percentiles in microseconds, errors.

local bodies = {}
local i = 0

function init(args)
  local path = args[1]
  if path ~= nil and path ~= "" then
    for line in io.lines(path) do
      if #line > 0 then
        bodies[#bodies + 1] = line
      end
    end
    wrk.method = "POST"
    wrk.headers["Content-Type"] = "application/json"
  end
end

function request()
  if #bodies == 0 then
    return wrk.format()
  end
  i = i % #bodies + 1
  return wrk.format(nil, nil, nil, bodies[i])
end

function done(summary, latency, requests)
  local secs = summary.duration / 1e6
  local e = summary.errors
  io.write(string.format(
    'RESULT {"requests": %d, "seconds": %.3f, "rps": %.1f, "p50_us": %d, "p90_us": %d, ' ..
    '"p99_us": %d, "max_us": %d, "non_2xx": %d, "socket_errors": %d}\n',
    summary.requests, secs, summary.requests / secs,
    latency:percentile(50), latency:percentile(90), latency:percentile(99), latency.max,
    e.status, e.connect + e.read + e.write + e.timeout))
end
