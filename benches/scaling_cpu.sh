#!/usr/bin/env bash
# CPU per score and per durable outcome on each store backend, measured from outside the
# process: the numbers SCALING.md sizes replicas and PostgreSQL from.
#
#   bash benches/scaling_cpu.sh                  # 2 rounds of 8 s per backend and load
#   ROUNDS=3 SECONDS_PER_ROUND=10 bash benches/scaling_cpu.sh
#   UNDERSTUDY_BIN=/path/to/understudy BACKENDS=sled bash benches/scaling_cpu.sh   # another build, sled only
#
# What it does:
#  1. builds the release binary; installs nothing (wrk and Debian's postgresql must be there);
#  2. starts a throwaway PostgreSQL cluster (Debian's initdb/pg_ctl, as the `postgres` user
#     when run as root; unix socket only; fsync and synchronous_commit on, as in production);
#  3. for each backend (sled in a fresh data dir, then PostgreSQL): `understudy serve` with
#     the starter config (`understudy init`: the invented invoice scenario, 7 features, an
#     elastic-net logistic model), schedule off; imports 3,000 invented labeled rows over HTTP
#     and trains the first model;
#  4. scores: `wrk -t2 -c64` POSTs one body to /v1/score for SECONDS_PER_ROUND, ROUNDS times;
#  5. outcomes: scores enough requests in batches to have fresh score ids, then `wrk -t2 -c64`
#     POSTs one outcome per id (each id once: every answer is a 201, a durable write);
#  6. examples: `wrk -t2 -c64` POSTs batches of 100 labeled rows with fresh ids to
#     /v1/examples (every 2xx a durable insert; the `examples100` rows: divide by 100 per row);
#  7. reads CPU time (utime + stime, /proc/<pid>/stat) before and after each round, of the
#     service and, on PostgreSQL, of the postmaster and every child of it (backends, WAL
#     writer, checkpointer): CPU per request on each side;
#  8. writes target/bench-reports/scaling_cpu.tsv and prints it; `requests`, the rate and the
#     CPU per request count answered requests only (`errors`, the non-2xx, apart).
#
# wrk runs as its own process on the same 2 cores: the rates are what this box does with the
# load generator beside the service, and only the CPU per request carries over to sizing.
set -euo pipefail
cd "$(dirname "$0")/.."

ROUNDS=${ROUNDS:-2}
SECONDS_PER_ROUND=${SECONDS_PER_ROUND:-8}
PORT=${PORT:-9131}

command -v wrk >/dev/null || { echo "wrk is needed (apt-get install wrk)" >&2; exit 1; }
cargo build --release --locked --bin understudy
bin=${UNDERSTUDY_BIN:-$(pwd)/target/release/understudy}
work=$(pwd)/target/scaling-cpu
rm -rf "$work"
mkdir -p "$work" target/bench-reports
# The cluster lives outside the checkout, where the postgres user can reach it.
source benches/pg_cluster.sh
pids=()
cleanup() {
  for pid in "${pids[@]}"; do kill "$pid" 2>/dev/null || true; done
  for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
  pg_cluster_stop
}
trap cleanup EXIT

echo "== PostgreSQL cluster"
pg_cluster_start understudy-scaling
export UNDERSTUDY_SCALING_DB="$pg_conninfo"

"$bin" demo --write-csv "$work/rows.csv" --rows 3000 >/dev/null
python3 - "$work" <<'PY'
import json, sys
work = sys.argv[1]
body = {"features": {"invoice_amount": 12500.0, "days_to_due": 30, "debtor_years_trading": 4,
        "prior_late_invoices": 1, "credit_utilisation": 0.4, "debtor_sector": "retail",
        "submission_channel": "edi"}}
with open(f"{work}/body.json", "w") as f:
    json.dump(body, f)
report = """done = function(summary, latency, requests)
  local e = summary.errors
  io.write(string.format("WRK %d %d %d %d %d\\n", summary.requests, summary.duration,
    latency:percentile(50), latency:percentile(99),
    e.connect + e.read + e.write + e.status + e.timeout))
end
"""
with open(f"{work}/score.lua", "w") as f:
    f.write('wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n')
    f.write("wrk.body = " + json.dumps(json.dumps(body)) + "\n" + report)
# Outcomes: each wrk thread walks its own share of the ids in ids.txt, one outcome per id.
with open(f"{work}/outcome.lua", "w") as f:
    f.write("""local threads = {}
local counter = 0
function setup(thread)
  counter = counter + 1
  thread:set("id", counter)
  table.insert(threads, thread)
end
function init(args)
  ids = {}
  for line in io.lines(os.getenv("UNDERSTUDY_IDS")) do ids[#ids + 1] = line end
  n = id
end
function request()
  local score_id = ids[n]
  n = n + 2
  if score_id == nil then score_id = "exhausted" end
  return wrk.format("POST", "/v1/outcomes", {["Content-Type"] = "application/json"},
    '{"score_id":"' .. score_id .. '","label":1}')
end
""" + report)
# Examples: 100 labeled rows per request, ids unique per thread and round (UNDERSTUDY_ROUND),
# so every row is a durable insert, not a duplicate.
row = json.dumps(body["features"])
with open(f"{work}/examples.lua", "w") as f:
    f.write("""local counter = 0
function setup(thread)
  counter = counter + 1
  thread:set("tid", counter)
end
function init(args)
  n = 0
  prefix = "ex-" .. os.getenv("UNDERSTUDY_ROUND") .. "-" .. tid .. "-"
end
function request()
  local rows = {}
  for i = 1, 100 do
    n = n + 1
    rows[i] = '{"id":"' .. prefix .. n .. '","event_time":"2026-11-02T10:00:00Z","label":'
      .. (n % 2) .. ',"features":FEATURES}'
  end
  return wrk.format("POST", "/v1/examples", {["Content-Type"] = "application/json"},
    "[" .. table.concat(rows, ",") .. "]")
end
""".replace("FEATURES", row) + report)
PY

ticks=$(getconf CLK_TCK)

report=target/bench-reports/scaling_cpu.tsv
printf 'backend\tload\tround\trequests\tseconds\treq_per_s\tp50_ms\tp99_ms\terrors\tservice_cpu_us_per_req\tpostgres_cpu_us_per_req\twal_bytes_per_req\n' > "$report"
psql_at() { as_pg "$pgbin/psql" -h "$pgroot" -U postgres -d understudy -Atc "$1"; }
wal_lsn() { psql_at "SELECT pg_current_wal_lsn()"; }

round() { # backend load round lua_script service_pid path
  local s0 p0 s1 p1 w0 w1 line
  w0=$(wal_lsn)
  s0=$(cpu_of "$5"); p0=$(pg_cpu)
  line=$(wrk -t2 -c64 -d"$SECONDS_PER_ROUND"s -s "$work/$4.lua" "$url/v1/$6" | grep '^WRK ')
  s1=$(cpu_of "$5"); p1=$(pg_cpu)
  if [ "$1" = postgres ]; then
    sleep 0.5   # the recorder's last batch of score records
  fi
  w1=$(wal_lsn)
  read -r _ req dur p50 p99 err <<< "$line"
  if [ "$1" = sled ]; then p1=$p0; w1=$w0; fi
  wal=$(psql_at "SELECT pg_wal_lsn_diff('$w1', '$w0')")
  python3 - "$1" "$2" "$3" "$req" "$dur" "$p50" "$p99" "$err" "$((s1 - s0))" "$((p1 - p0))" "$ticks" "$wal" >> "$report" <<'PY'
import sys
backend, load, rnd, req, dur, p50, p99, err, s, p, ticks, wal = sys.argv[1:]
req, dur, s, p, ticks, wal = int(req), int(dur), int(s), int(p), int(ticks), float(wal)
# Only answered requests count: a round that ran out of fresh ids (404s) or was shed (503s)
# would otherwise report a rate, and a CPU per request, of work it did not do.
req = req - int(err)
us = lambda t: t * 1e6 / ticks / max(req, 1)
print(f"{backend}\t{load}\t{rnd}\t{req}\t{dur/1e6:.1f}\t{req/(dur/1e6):.0f}\t{int(p50)/1000:.2f}\t{int(p99)/1000:.2f}\t{err}\t{us(s):.1f}\t{us(p):.1f}\t{wal/max(req,1):.0f}")
PY
  tail -1 "$report"
}

for backend in ${BACKENDS:-sled postgres}; do
  echo "== $backend"
  data="$work/data-$backend"
  config="$work/$backend.toml"
  "$bin" init "$config" >/dev/null
  service_config "$config" "$PORT" "$data" "$backend" UNDERSTUDY_SCALING_DB
  "$bin" serve --config "$config" > "$work/$backend.log" 2>&1 &
  service=$!
  pids+=("$service")
  url="http://127.0.0.1:$PORT"
  for _ in $(seq 1 100); do curl -fs "$url/healthz" >/dev/null 2>&1 && break; sleep 0.1; done
  "$bin" import "$work/rows.csv" --config "$config" --server "$url" >/dev/null
  "$bin" retrain --server "$url" >/dev/null
  wrk -t2 -c64 -d2s -s "$work/score.lua" "$url/v1/score" >/dev/null   # warm-up
  for r in $(seq 1 "$ROUNDS"); do
    round "$backend" score "$r" score "$service" score
    # Fresh ids for the outcome round: OUTCOME_IDS, more than the fastest rate seen here
    # could use (31k/s on a faster 2-core box ran past 200,000 in 8 s). Requests past the
    # last id get 404s: they are counted as errors and left out of the rate and the CPU.
    python3 - "$url" "$work/ids.txt" "$work/body.json" "${OUTCOME_IDS:-500000}" <<'PY'
import json, sys, urllib.request
url, out, body, wanted = sys.argv[1:]
features = json.load(open(body))["features"]
import time, urllib.error
ids = []
while len(ids) < int(wanted):
    req = urllib.request.Request(f"{url}/v1/score/batch", method="POST",
        data=json.dumps({"items": [{"features": features}] * 1000}).encode(),
        headers={"Content-Type": "application/json"})
    try:
        ids += [r["score_id"] for r in json.load(urllib.request.urlopen(req))["results"]]
    except urllib.error.HTTPError as e:
        if e.code != 503:
            raise
        time.sleep(0.2)   # the recorder's buffer is full: it drains
open(out, "w").write("\n".join(ids) + "\n")
PY
    sleep 0.5   # the recorder's last batch is written
    UNDERSTUDY_IDS="$work/ids.txt" round "$backend" outcome "$r" outcome "$service" outcomes
    # 100 rows per request: rows/s and CPU per row are the figures divided by 100.
    UNDERSTUDY_ROUND="$r" round "$backend" examples100 "$r" examples "$service" examples
  done
  if [ "$backend" = postgres ]; then
    echo "== PostgreSQL table sizes (rows, bytes with indexes and TOAST, bytes per row)"
    for table in scores examples; do
      psql_at "SELECT '$table', count(*), pg_total_relation_size('$table'),
               pg_total_relation_size('$table') / greatest(count(*), 1) FROM $table" \
        | tr '|' '\t' | tee -a "$work/pg_sizes.tsv"
    done
  fi
  kill "$service"; wait "$service" 2>/dev/null || true
done

echo "== $report"
column -t -s $'\t' "$report"
