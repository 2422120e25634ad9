#!/usr/bin/env bash
# Scoring on PostgreSQL against scoring on sled, alternating rounds in one run: the two
# services run side by side (their own ports, the same starter config and data, schedule off)
# and `wrk -t2 -c64` (its own process) scores each in turn, the order flipped every round.
#
#   bash benches/backend_scoring.sh              # 3 rounds of 8 s per backend
#   ROUNDS=5 SECONDS_PER_ROUND=10 bash benches/backend_scoring.sh
#
# Reports per round requests/s, the service's CPU per request and, on PostgreSQL, the
# postmaster's and its children's (from /proc/<pid>/stat), and the ratio PostgreSQL/sled of
# requests/s; the median of the per-round ratios is the figure. Needs wrk and Debian's
# postgresql (as benches/scaling_cpu.sh). Report: target/bench-reports/backend_scoring.tsv.
set -euo pipefail
cd "$(dirname "$0")/.."

ROUNDS=${ROUNDS:-3}
SECONDS_PER_ROUND=${SECONDS_PER_ROUND:-8}
SLED_PORT=${SLED_PORT:-9141}
PG_PORT=${PG_PORT:-9142}

command -v wrk >/dev/null || { echo "wrk is needed (apt-get install wrk)" >&2; exit 1; }
cargo build --release --locked --bin understudy
bin=$(pwd)/target/release/understudy
work=$(pwd)/target/backend-scoring
rm -rf "$work"
mkdir -p "$work" target/bench-reports
source benches/pg_cluster.sh
pids=()
cleanup() {
  for pid in "${pids[@]}"; do kill "$pid" 2>/dev/null || true; done
  for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
  pg_cluster_stop
}
trap cleanup EXIT
pg_cluster_start understudy-backends
export UNDERSTUDY_BACKENDS_DB="$pg_conninfo"

"$bin" demo --write-csv "$work/rows.csv" --rows 3000 >/dev/null
cat > "$work/score.lua" <<'LUA'
wrk.method = "POST"
wrk.headers["Content-Type"] = "application/json"
wrk.body = '{"features":{"invoice_amount":12500.0,"days_to_due":30,"debtor_years_trading":4,"prior_late_invoices":1,"credit_utilisation":0.4,"debtor_sector":"retail","submission_channel":"edi"}}'
done = function(summary, latency, requests)
  io.write(string.format("WRK %d %d\n", summary.requests, summary.duration))
end
LUA

declare -A service url
for backend in sled postgres; do
  port=$SLED_PORT; [ "$backend" = postgres ] && port=$PG_PORT
  config="$work/$backend.toml"
  "$bin" init "$config" >/dev/null
  service_config "$config" "$port" "$work/data-$backend" "$backend" UNDERSTUDY_BACKENDS_DB
  "$bin" serve --config "$config" > "$work/$backend.log" 2>&1 &
  service[$backend]=$!
  pids+=("$!")
  url[$backend]="http://127.0.0.1:$port"
  for _ in $(seq 1 100); do curl -fs "${url[$backend]}/healthz" >/dev/null 2>&1 && break; sleep 0.1; done
  "$bin" import "$work/rows.csv" --config "$config" --server "${url[$backend]}" >/dev/null
  "$bin" retrain --server "${url[$backend]}" >/dev/null
  wrk -t2 -c64 -d2s -s "$work/score.lua" "${url[$backend]}/v1/score" >/dev/null   # warm-up
done

ticks=$(getconf CLK_TCK)

report=target/bench-reports/backend_scoring.tsv
printf 'round\tbackend\treq_per_s\tservice_cpu_us_per_req\tpostgres_cpu_us_per_req\n' > "$report"
for r in $(seq 1 "$ROUNDS"); do
  order="sled postgres"; [ $((r % 2)) -eq 0 ] && order="postgres sled"
  for backend in $order; do
    s0=$(cpu_of "${service[$backend]}"); p0=$(pg_cpu)
    line=$(wrk -t2 -c64 -d"$SECONDS_PER_ROUND"s -s "$work/score.lua" "${url[$backend]}/v1/score" | grep '^WRK ')
    s1=$(cpu_of "${service[$backend]}"); p1=$(pg_cpu)
    read -r _ req dur <<< "$line"
    python3 - "$r" "$backend" "$req" "$dur" "$((s1 - s0))" "$((p1 - p0))" "$ticks" >> "$report" <<'PY'
import sys
r, backend, req, dur, s, p, ticks = sys.argv[1:]
req, dur, s, p, ticks = int(req), int(dur), int(s), int(p), int(ticks)
us = lambda t: t * 1e6 / ticks / max(req, 1)
print(f"{r}\t{backend}\t{req / (dur / 1e6):.0f}\t{us(s):.1f}\t{us(p):.1f}")
PY
    tail -1 "$report"
  done
done
python3 - "$report" <<'PY'
import csv, statistics, sys
rows = list(csv.DictReader(open(sys.argv[1]), delimiter="\t"))
by = {}
for row in rows:
    by.setdefault(row["round"], {})[row["backend"]] = float(row["req_per_s"])
ratios = [v["postgres"] / v["sled"] for v in by.values()]
print("PostgreSQL/sled requests/s per round:", ", ".join(f"{x:.3f}" for x in ratios))
print(f"median {statistics.median(ratios):.3f}")
PY
