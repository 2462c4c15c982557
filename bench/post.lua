-- wrk script: POST JSON bodies read from a file (one per line, cycled, keep-alive).
-- Each "@ID@" in a body becomes an id unique to this run, thread, request and position, so
-- labels are never deduplicated. Arguments after "--": the bodies file, then a run tag.
-- done() prints one BENCH-JSON line with the counts and latency percentiles in microseconds.

local templates = {}
local plain = {}
local counter = 0
local run_tag = "run"
local threads = 0

function setup(thread)
  threads = threads + 1
  thread:set("thread_tag", "t" .. threads)
end

local function split(line)
  local parts, start = {}, 1
  while true do
    local i, j = string.find(line, "@ID@", start, true)
    if not i then
      parts[#parts + 1] = string.sub(line, start)
      return parts
    end
    parts[#parts + 1] = string.sub(line, start, i - 1)
    start = j + 1
  end
end

function init(args)
  run_tag = args[2] or run_tag
  wrk.method = "POST"
  wrk.headers["Content-Type"] = "application/json"
  for line in io.lines(args[1]) do
    if #line > 0 then
      local parts = split(line)
      templates[#templates + 1] = parts
      if #parts == 1 then
        plain[#templates] = wrk.format(nil, nil, nil, parts[1])
      end
    end
  end
end

function request()
  counter = counter + 1
  local k = (counter - 1) % #templates + 1
  if plain[k] then
    return plain[k]
  end
  local parts = templates[k]
  local prefix = run_tag .. "-" .. (thread_tag or "t") .. "-" .. counter .. "-"
  local out = { parts[1] }
  for n = 2, #parts do
    out[#out + 1] = prefix .. (n - 1)
    out[#out + 1] = parts[n]
  end
  return wrk.format(nil, nil, nil, table.concat(out))
end

function done(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    'BENCH-JSON {"requests": %d, "duration_us": %d, "p50_us": %d, "p99_us": %d, ' ..
    '"max_us": %d, "status_errors": %d, "connect": %d, "read": %d, "write": %d, ' ..
    '"timeout": %d}\n',
    summary.requests, summary.duration, latency:percentile(50), latency:percentile(99),
    latency.max, e.status, e.connect, e.read, e.write, e.timeout))
end
