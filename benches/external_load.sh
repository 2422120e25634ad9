#!/usr/bin/env bash
# Scoring under load from outside the process: the release `understudy serve` against a bare
# axum ceiling, each its own process, driven by wrk (its own process) in alternating rounds.
#
#   bash benches/external_load.sh            # 3 rounds of 8 s per server
#   ROUNDS=5 SECONDS_PER_ROUND=8 bash benches/external_load.sh
#   UNDERSTUDY_BIN=/path/to/understudy bash benches/external_load.sh   # another build of the service
#
# What it does:
#  1. builds the release binary and the two helper programs (`examples/bare_ceiling.rs`,
#     `examples/paced_load.rs`), and installs Debian's `wrk` if it is missing;
#  2. sets up the service on 30 numeric features with a pinned L2 logistic model: a config, a
#     CSV of invented rows imported into a fresh data dir, `serve`, then a retrain over HTTP;
#     the service records every score, as in production;
#  3. starts the bare ceiling (the same body into a fixed struct, a dot product, a sigmoid);
#  4. runs `wrk -t2 -c64 -d${SECONDS_PER_ROUND}s` against each in turn, ROUNDS times, the order
#     flipped every round, reading each server's CPU time (utime + stime of the whole process,
#     from /proc/<pid>/stat) before and after its round: server CPU per request;
#  5. paces each server at half its median saturated rate (`paced_load`, latency from each
#     request's due time) and reports p50/p99;
#  6. writes target/bench-reports/external_load.json and .md: per round and medians, and the
#     ratios service/ceiling as the median of the per-round ratios.
#
# The machine is shared and its speed drifts: only ratios within one run mean much.
set -euo pipefail
cd "$(dirname "$0")/.."

ROUNDS=${ROUNDS:-3}
SECONDS_PER_ROUND=${SECONDS_PER_ROUND:-8}
PACED_SECONDS=${PACED_SECONDS:-8}
SERVICE_PORT=${SERVICE_PORT:-9111}
CEILING_PORT=${CEILING_PORT:-9112}

if ! command -v wrk >/dev/null 2>&1; then
  echo "== installing wrk (Debian)"
  if [ "$(id -u)" -eq 0 ]; then as_root=""; else as_root="sudo"; fi
  $as_root apt-get update -q
  DEBIAN_FRONTEND=noninteractive $as_root apt-get install -y -q --no-install-recommends wrk
fi

echo "== building (release)"
cargo build --release --locked --bin understudy --example bare_ceiling --example paced_load

work=target/external-load
rm -rf "$work"
mkdir -p "$work" target/bench-reports
bin=${UNDERSTUDY_BIN:-target/release/understudy}

# The config: 30 numeric features f00..f29, a pinned L2 logistic, no schedule (runs only on
# request), no keys (open on loopback).
{
  printf '[server]\nlisten = "127.0.0.1:%s"\ndata_dir = "%s/data"\n\n' "$SERVICE_PORT" "$work"
  printf '[label]\nname = "outcome"\n\n'
  printf '[training]\nwindow_rows = 5000\nholdout_fraction = 0.25\nfolds = 5\nmin_rows = 500\n\n'
  printf '[[training.families]]\nfamily = "logistic"\npenalty = "l2"\nlambda = [0.01]\n\n'
  printf '[gate]\nmetric = "auc"\nmargin = 0.02\nmin_rows = 200\n\n[schedule]\n'
  for j in $(seq -w 0 29); do
    printf '\n[[features]]\nname = "f%s"\nkind = "number"\nmin = -1000\nmax = 1000\n' "$j"
  done
} > "$work/understudy.toml"

# 3,000 invented labeled rows over the last 30 days, and one score body.
python3 - "$work" <<'PY'
import json, math, random, sys, datetime
work = sys.argv[1]
rng = random.Random(7)
now = datetime.datetime.now(datetime.timezone.utc)
names = [f"f{j:02d}" for j in range(30)]
with open(f"{work}/rows.csv", "w") as f:
    f.write(",".join(["id", "event_time", *names, "outcome"]) + "\n")
    for i in range(3000):
        x = [rng.uniform(-50, 50) for _ in names]
        z = sum(v * (j - 15) / 300 for j, v in enumerate(x)) - 0.3
        y = int(rng.random() < 1 / (1 + math.exp(-z)))
        t = (now - datetime.timedelta(minutes=10 * (3000 - i))).strftime("%Y-%m-%dT%H:%M:%SZ")
        f.write(",".join([f"r{i}", t, *(f"{v:.6f}" for v in x), str(y)]) + "\n")
body = {"features": {n: round(rng.uniform(-50, 50), 6) for n in names}}
with open(f"{work}/body.json", "w") as f:
    json.dump(body, f)
with open(f"{work}/post.lua", "w") as f:
    f.write('wrk.method = "POST"\n')
    f.write('wrk.headers["Content-Type"] = "application/json"\n')
    f.write("wrk.body = " + json.dumps(json.dumps(body)) + "\n")
    f.write("""done = function(summary, latency, requests)
  local e = summary.errors
  io.write(string.format("WRK %d %d %d %d %d\\n", summary.requests, summary.duration,
    latency:percentile(50), latency:percentile(99),
    e.connect + e.read + e.write + e.status + e.timeout))
end
""")
PY

pids=()
cleanup() {
  for pid in "${pids[@]}"; do kill "$pid" 2>/dev/null || true; done
  for pid in "${pids[@]}"; do wait "$pid" 2>/dev/null || true; done
}
trap cleanup EXIT

echo "== setting up the service (import, serve, retrain)"
"$bin" import "$work/rows.csv" --config "$work/understudy.toml" >/dev/null
"$bin" serve --config "$work/understudy.toml" > "$work/service.log" 2>&1 &
service_pid=$!
pids+=("$service_pid")
service_url="http://127.0.0.1:$SERVICE_PORT"
for _ in $(seq 1 100); do
  curl -fs "$service_url/healthz" >/dev/null 2>&1 && break
  sleep 0.1
done
"$bin" retrain --server "$service_url" >/dev/null
curl -fs "$service_url/readyz" >/dev/null || { echo "no active model; see $work/service.log" >&2; exit 1; }

target/release/examples/bare_ceiling "127.0.0.1:$CEILING_PORT" > "$work/ceiling.log" 2>&1 &
ceiling_pid=$!
pids+=("$ceiling_pid")
ceiling_url="http://127.0.0.1:$CEILING_PORT"
for _ in $(seq 1 100); do
  curl -fs -X POST -H 'content-type: application/json' --data @"$work/body.json" \
    "$ceiling_url/v1/score" >/dev/null 2>&1 && break
  sleep 0.1
done
curl -fs -X POST -H 'content-type: application/json' --data @"$work/body.json" \
  "$service_url/v1/score" > "$work/service_answer.json"

ticks=$(getconf CLK_TCK)
# utime + stime of the whole process in clock ticks (fields 14 and 15; the name may hold
# spaces, so count from after its closing parenthesis).
cpu_ticks() { sed 's/.*) //' "/proc/$1/stat" | awk '{print $12 + $13}'; }

results="$work/rounds.tsv"
printf 'round\tseries\trequests\tduration_us\tp50_us\tp99_us\terrors\tcpu_ticks\n' > "$results"
one_round() { # round series url pid seconds
  local before after line
  before=$(cpu_ticks "$4")
  line=$(wrk -t2 -c64 -d"$5"s -s "$work/post.lua" "$3/v1/score" | grep '^WRK ')
  after=$(cpu_ticks "$4")
  read -r _ req dur p50 p99 err <<< "$line"
  printf '%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\n' "$1" "$2" "$req" "$dur" "$p50" "$p99" "$err" \
    "$((after - before))" >> "$results"
  echo "   round $1 $2: $req requests in ${dur} us, p99 ${p99} us, errors $err, cpu ticks $((after - before))"
}

echo "== warm-up (2 s each, not counted)"
wrk -t2 -c64 -d2s -s "$work/post.lua" "$service_url/v1/score" >/dev/null
wrk -t2 -c64 -d2s -s "$work/post.lua" "$ceiling_url/v1/score" >/dev/null

echo "== $ROUNDS alternating rounds of wrk -t2 -c64 -d${SECONDS_PER_ROUND}s"
for r in $(seq 1 "$ROUNDS"); do
  if [ $((r % 2)) -eq 1 ]; then
    one_round "$r" ceiling "$ceiling_url" "$ceiling_pid" "$SECONDS_PER_ROUND"
    one_round "$r" service "$service_url" "$service_pid" "$SECONDS_PER_ROUND"
  else
    one_round "$r" service "$service_url" "$service_pid" "$SECONDS_PER_ROUND"
    one_round "$r" ceiling "$ceiling_url" "$ceiling_pid" "$SECONDS_PER_ROUND"
  fi
done

median_rate() { # series
  awk -F'\t' -v s="$1" 'NR > 1 && $2 == s { print $3 / ($4 / 1e6) }' "$results" \
    | sort -g | awk '{ v[NR] = $1 } END { print v[int((NR + 1) / 2)] }'
}
service_half=$(median_rate service | awk '{ printf "%d", $1 / 2 }')
ceiling_half=$(median_rate ceiling | awk '{ printf "%d", $1 / 2 }')
echo "== paced at half the median saturated rate, ${PACED_SECONDS} s, 32 connections"
paced_service=$(target/release/examples/paced_load "127.0.0.1:$SERVICE_PORT" /v1/score \
  "$work/body.json" "$service_half" "$PACED_SECONDS" 32)
echo "   service at $service_half req/s: $paced_service"
paced_ceiling=$(target/release/examples/paced_load "127.0.0.1:$CEILING_PORT" /v1/score \
  "$work/body.json" "$ceiling_half" "$PACED_SECONDS" 32)
echo "   ceiling at $ceiling_half req/s: $paced_ceiling"

python3 - "$results" "$ticks" "$paced_service" "$paced_ceiling" "$ROUNDS" "$SECONDS_PER_ROUND" \
  "$work/service_answer.json" <<'PY'
import csv, json, statistics, sys, datetime, os, platform
path, ticks = sys.argv[1], float(sys.argv[2])
paced = {"service": json.loads(sys.argv[3]), "ceiling": json.loads(sys.argv[4])}
rounds, seconds = int(sys.argv[5]), int(sys.argv[6])
answer = open(sys.argv[7]).read().strip()
rows = list(csv.DictReader(open(path), delimiter="\t"))
per = {}
for r in rows:
    req = int(r["requests"])
    per.setdefault(int(r["round"]), {})[r["series"]] = {
        "requests": req,
        "rps": req / (int(r["duration_us"]) / 1e6),
        "p50_ms": int(r["p50_us"]) / 1000,
        "p99_ms": int(r["p99_us"]) / 1000,
        "errors": int(r["errors"]),
        "cpu_us_per_request": int(r["cpu_ticks"]) / ticks * 1e6 / max(req, 1),
    }
med = statistics.median
def series(name, key):
    return [per[k][name][key] for k in sorted(per)]
throughput_ratios = [per[k]["service"]["rps"] / per[k]["ceiling"]["rps"] for k in sorted(per)]
cpu_ratios = [per[k]["ceiling"]["cpu_us_per_request"] / per[k]["service"]["cpu_us_per_request"]
              for k in sorted(per)]
report = {
    "date": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
    "load": f"wrk -t2 -c64 -d{seconds}s, {rounds} alternating rounds",
    "cores": os.cpu_count(), "loadavg_at_end": os.getloadavg(),
    "rounds": per,
    "median": {s: {k: med(series(s, k)) for k in ("rps", "p50_ms", "p99_ms", "cpu_us_per_request")}
               for s in ("service", "ceiling")},
    "throughput_ratio_per_round": throughput_ratios,
    "throughput_ratio_median": med(throughput_ratios),
    "cpu_ratio_per_round": cpu_ratios,
    "cpu_ratio_median": med(cpu_ratios),
    "paced_half_rate": paced,
    "service_answer": json.loads(answer),
}
os.makedirs("target/bench-reports", exist_ok=True)
json.dump(report, open("target/bench-reports/external_load.json", "w"), indent=2)
m = report["median"]
lines = [
    f"# External scoring load ({report['date']}; {report['load']}; load average at end {report['loadavg_at_end'][0]:.2f})",
    "",
    "| series | req/s (median) | p50 | p99 | server CPU per request |",
    "| --- | ---: | ---: | ---: | ---: |",
]
for s, label in (("ceiling", "bare axum ceiling"), ("service", "`POST /v1/score`")):
    lines.append(f"| {label} | {m[s]['rps']:,.0f} | {m[s]['p50_ms']:.3f} ms | {m[s]['p99_ms']:.3f} ms | {m[s]['cpu_us_per_request']:.1f} µs |")
lines += [
    "",
    "| round | ceiling req/s | service req/s | throughput ratio | ceiling CPU/req | service CPU/req | CPU ratio (ceiling/service) |",
    "| --- | ---: | ---: | ---: | ---: | ---: | ---: |",
]
for k in sorted(per):
    c, s = per[k]["ceiling"], per[k]["service"]
    lines.append(f"| {k} | {c['rps']:,.0f} | {s['rps']:,.0f} | {s['rps']/c['rps']:.3f} | {c['cpu_us_per_request']:.1f} µs | {s['cpu_us_per_request']:.1f} µs | {c['cpu_us_per_request']/s['cpu_us_per_request']:.3f} |")
lines += [
    "",
    f"Median of per-round ratios: throughput **{report['throughput_ratio_median']:.3f}**, CPU per request (ceiling/service) **{report['cpu_ratio_median']:.3f}**.",
    "",
    "| paced at half the median saturated rate | target req/s | achieved | p50 | p99 | p99.9 | errors |",
    "| --- | ---: | ---: | ---: | ---: | ---: | ---: |",
]
for s in ("ceiling", "service"):
    p = paced[s]
    lines.append(f"| {s} | {p['target_rate']:,.0f} | {p['achieved_rate']:,.0f} | {p['p50_ms']:.3f} ms | {p['p99_ms']:.3f} ms | {p['p999_ms']:.3f} ms | {p['errors']} |")
open("target/bench-reports/external_load.md", "w").write("\n".join(lines) + "\n")
print("\n".join(lines))
PY
