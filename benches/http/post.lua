-- wrk script: POST the file named by the BODY environment variable to /v1/rerank.
local f = assert(io.open(os.getenv("BODY"), "rb"))
wrk.method = "POST"
wrk.body = f:read("*a")
f:close()
wrk.headers["Content-Type"] = "application/json"

done = function(summary, latency, requests)
  io.write(string.format("requests=%d errors=%d p50_us=%d p90_us=%d p99_us=%d\n",
    summary.requests, summary.errors.status + summary.errors.connect + summary.errors.read +
    summary.errors.write + summary.errors.timeout,
    latency:percentile(50), latency:percentile(90), latency:percentile(99)))
end
