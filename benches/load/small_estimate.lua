-- wrk script: POST one single-step estimate request (model + prior + one reading) on
-- every call. The body is made once by gen.py and passed in via the BODY_FILE variable.
local f = assert(io.open(os.getenv("BODY_FILE") or "/tmp/tacit-small.json", "rb"))
local body = f:read("*a")
f:close()

wrk.method = "POST"
wrk.body = body
wrk.headers["Content-Type"] = "application/json"
if os.getenv("TACIT_KEY") then
  wrk.headers["Authorization"] = "Bearer " .. os.getenv("TACIT_KEY")
end

-- Report the percentiles the targets name, in milliseconds.
done = function(summary, latency, requests)
  io.write(string.format("requests/s: %.0f\n", summary.requests / (summary.duration / 1e6)))
  for _, p in ipairs({ 50, 90, 99, 99.9 }) do
    io.write(string.format("p%-5s %.3f ms\n", p, latency:percentile(p) / 1000))
  end
  local e = summary.errors
  io.write(string.format("errors: connect %d, read %d, write %d, status %d, timeout %d\n",
    e.connect, e.read, e.write, e.status, e.timeout))
end
