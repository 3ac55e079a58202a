-- wrk script: POST new readings of the demo train to stagewatch's ingest route.
--
-- Used by bench/bench_service.py; run with one wrk thread (-t1), which keeps one
-- time cursor, so every request carries readings newer than the last one's:
--
--   wrk -t1 -c16 -d15s -s bench/wrk/ingest.lua http://127.0.0.1:PORT \
--       -- PATH KEY START STEP BATCH MIX
--
-- PATH   the readings route (/api/v1/trains/<name>/readings)
-- KEY    an API key with the ingest role
-- START  time of the first reading [epoch s]; each time point is STEP [s] later
-- BATCH  readings per request
-- MIX    which tags each time point carries:
--          plant   FI-200, TI-201, TI-202 at every point, the feed analyzer AI-200G
--                  every 120 s and the product analyzer AI-203G every 240 s of
--                  reading time (the demo's analyzer cycles), from 240 s on
--          every   all five tags at every point
--          single  one tag per point, FI-200, TI-201, TI-202, AI-200G in turn
--
-- Values are near the demo's operating point with transmitter-sized noise. Each
-- response's "accepted" count is added up; done() prints one line
-- "WRKJSON {...}" with the totals and latency percentiles for the bench to parse.

local threads = {}

function setup(thread)
  table.insert(threads, thread)
  if #threads > 1 then
    error("ingest.lua keeps one time cursor: run wrk with -t1")
  end
end

-- Per tag: operating point and 1-sigma noise, in the tag's declared unit.
local LEVEL = {
  ["FI-200"] = {12.0, 0.06},    -- m^3/h
  ["TI-201"] = {58.0, 0.1},     -- degC
  ["TI-202"] = {58.0, 0.1},     -- degC
  ["AI-200G"] = {2400.0, 25.0}, -- mol/m^3, feed glucose
  ["AI-203G"] = {1290.0, 20.0}, -- mol/m^3, glucose leaving R-203
}
local TRANSMITTERS = {"FI-200", "TI-201", "TI-202"}
local ROTATION = {"FI-200", "TI-201", "TI-202", "AI-200G"}

local path, key, start, step, batch, mix
local headers
local pending = {}   -- readings of the current point not yet sent

-- Totals read by done() through thread:get().
point = 0      -- time points used so far
accepted = 0
ok = 0
bad = 0
refusing = 0
first_bad = ""

function init(args)
  path, key = args[1], args[2]
  start, step = tonumber(args[3]), tonumber(args[4])
  batch, mix = tonumber(args[5]), args[6]
  if not (path and key and start and step and batch and mix) then
    error("arguments: PATH KEY START STEP BATCH MIX")
  end
  headers = {["Content-Type"] = "application/json", ["Authorization"] = "Bearer " .. key}
  math.randomseed(20260302)
end

local function noise()
  -- Sum of three uniforms (variance 1/12 each), scaled to unit variance.
  return (math.random() + math.random() + math.random() - 1.5) * 2.0
end

local function reading(tag, t)
  local level = LEVEL[tag]
  return string.format('{"tag":"%s","time":%.3f,"value":%.4f}',
                       tag, t, level[1] + level[2] * noise())
end

local function fill()
  local t = start + point * step
  local tags
  if mix == "single" then
    tags = {ROTATION[point % #ROTATION + 1]}
  elseif mix == "every" then
    tags = {"FI-200", "TI-201", "TI-202", "AI-200G", "AI-203G"}
  else
    tags = {TRANSMITTERS[1], TRANSMITTERS[2], TRANSMITTERS[3]}
    local at = t - start
    if math.fmod(at, 120.0) < step then table.insert(tags, "AI-200G") end
    -- From 240 s on: before that its sample (4 min dead time) predates the first reading.
    if at >= 240.0 and math.fmod(at, 240.0) < step then table.insert(tags, "AI-203G") end
  end
  for _, tag in ipairs(tags) do
    table.insert(pending, reading(tag, t))
  end
  point = point + 1
end

-- wrk 4 calls request() once on the first thread's state before the run, to
-- check the script (script_verify_request), and never sends what it returns: that
-- first call gets a placeholder, so that no readings are used up unsent.
local verified = false

function request()
  if not verified then
    verified = true
    return wrk.format("GET", "/healthz")
  end
  local parts = {}
  while #parts < batch do
    if #pending == 0 then fill() end
    table.insert(parts, table.remove(pending, 1))
  end
  local body = '{"readings":[' .. table.concat(parts, ",") .. ']}'
  return wrk.format("POST", path, headers, body)
end

function response(status, headers, body)
  if status == 200 then
    ok = ok + 1
    accepted = accepted + (tonumber(body:match('"accepted":(%d+)')) or 0)
    if body:find('"refused":[{', 1, true) then
      refusing = refusing + 1
      if first_bad == "" then first_bad = body:sub(1, 300) end
    end
  else
    bad = bad + 1
    if first_bad == "" then first_bad = status .. " " .. body:sub(1, 300) end
  end
end

local function json_string(text)
  return '"' .. text:gsub('[%c"\\]', function(c)
    return string.format("\\u%04x", c:byte())
  end) .. '"'
end

function done(summary, latency, requests)
  local t = threads[1]
  local e = summary.errors
  io.write(string.format(
    'WRKJSON {"duration_us":%d,"requests":%d,"ok":%d,"bad":%d,"refusing":%d,' ..
    '"accepted":%d,"points":%d,"socket_errors":%d,"p50_us":%d,"p99_us":%d,' ..
    '"max_us":%d,"first_bad":%s}\n',
    summary.duration, summary.requests, t:get("ok"), t:get("bad"), t:get("refusing"),
    t:get("accepted"), t:get("point"),
    e.connect + e.read + e.write + e.timeout,
    latency:percentile(50), latency:percentile(99), latency.max,
    json_string(t:get("first_bad"))))
end
