-- wrk script: POST one small JSON reading to the bare FastAPI endpoint that
-- bench/bench_service.py starts as its ceiling (same body every time).
--
--   wrk -t1 -c16 -d15s -s bench/wrk/bare.lua http://127.0.0.1:PORT/bare
--
-- done() prints one line "WRKJSON {...}" in the format of ingest.lua.

wrk.method = "POST"
wrk.body = '{"tag":"FI-200","time":1767225600.0,"value":12.0}'
wrk.headers["Content-Type"] = "application/json"

function done(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    'WRKJSON {"duration_us":%d,"requests":%d,"ok":%d,"bad":%d,"refusing":0,' ..
    '"accepted":0,"points":0,"socket_errors":%d,"p50_us":%d,"p99_us":%d,' ..
    '"max_us":%d,"first_bad":""}\n',
    summary.duration, summary.requests, summary.requests - e.status, e.status,
    e.connect + e.read + e.write + e.timeout,
    latency:percentile(50), latency:percentile(99), latency.max))
end
