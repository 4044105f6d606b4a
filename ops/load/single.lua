-- wrk script: one claim per request, each with a new claim id; claimants, repairers and payee
-- accounts repeat across claims so that history lookups find something, as in real traffic.
-- The API key comes from the environment (LOAD_KEY); the bare ceiling server ignores it.
local counter = 0
tid = tid or 0 -- set per thread by setup()
local threads = {}

function setup(thread)
  thread:set("tid", #threads + 1)
  table.insert(threads, thread)
end

local key = os.getenv("LOAD_KEY") or ""
local run = os.getenv("RUN_ID") or "r"
local headers = {
  ["Content-Type"] = "application/json",
  ["Authorization"] = "Bearer " .. key,
}

function claim_json(n)
  local id = string.format("%s-%d-%d", run, tid, n)
  local claimant = n % 50021
  local repairer = n % 1409
  local account = n % 30011
  local amount = 500 + (n * 7919) % 20000
  return string.format(
    '{"claim_id":"W-%s","policy_id":"P-%d","claimant_id":"K-%d","line":"motor",' ..
    '"loss_date":"2025-06-02","loss_time":"23:40","reported_at":"2025-06-04T09:00:00Z",' ..
    '"policy_start":"2024-05-28","claimed_amount":%d,"sum_insured":30000,"currency":"EUR",' ..
    '"parties":[{"role":"repairer","id":"R-%d"},{"role":"payee_account","id":"B-%d"}],' ..
    '"circumstances":{"police_report":%s,"injury":false,"theft":%s}}',
    id, claimant, claimant, amount, repairer, account,
    (n % 3 == 0) and "false" or "true", (n % 5 == 0) and "true" or "false")
end

function request()
  counter = counter + 1
  return wrk.format("POST", "/v1/claims", headers, claim_json(counter))
end
