-- wrk script: newline-delimited batches of BATCH claims (default 1000) per request, every claim
-- with a new id. Claims per second = requests per second x BATCH.
dofile(os.getenv("LOAD_DIR") .. "/single.lua")
local batch = tonumber(os.getenv("BATCH") or "1000")
local bheaders = {
  ["Content-Type"] = "application/x-ndjson",
  ["Authorization"] = "Bearer " .. (os.getenv("LOAD_KEY") or ""),
}
local n = 0

function request()
  local lines = {}
  for i = 1, batch do
    n = n + 1
    lines[i] = claim_json(n + 100000000)
  end
  return wrk.format("POST", "/v1/claims/batch", bheaders, table.concat(lines, "\n") .. "\n")
end
