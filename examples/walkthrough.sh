#!/usr/bin/env bash
# understudy with curl, start to finish, on the invented invoice scenario (Harbourline Trade
# Credit scores invoices for the chance the debtor pays more than 30 days late):
#
#   1. a CSV of labeled rows (invented here; use your own)   5. retrain and wait for the verdict
#   2. init: a config guessed from the CSV                   6. score a request
#   3. serve                                                 7. send its outcome when it is known
#   4. labeled history: the CSV in bulk, one example by hand 8. read the promotion log
#
# Usage: examples/walkthrough.sh [--keep-serving]
#   UNDERSTUDY  the binary (default: `understudy` on PATH)
#   PORT        loopback port to serve on (default 8080)
#   WORK        directory for the CSV, the config, the store and the server's log
#               (default: a new temporary directory)
# With --keep-serving the server is left running for further calls (its pid is in
# $WORK/server.pid); otherwise it is stopped on exit. The API is open here because the server
# listens on loopback only; give it keys (`[[access.keys]]`) before it listens anywhere else.
set -euo pipefail

UNDERSTUDY=${UNDERSTUDY:-understudy}
PORT=${PORT:-8080}
WORK=${WORK:-$(mktemp -d)}
BASE="http://127.0.0.1:$PORT"
keep=0
if [ "${1:-}" = "--keep-serving" ]; then keep=1; fi

step() { printf '\n== %s\n' "$*"; }
# curl that fails on an HTTP error but still prints the problem body the server sent.
call() { curl --silent --show-error --fail-with-body "$@"; echo; }
# One string member of a compact JSON answer (enough for this walk-through; use jq in earnest).
member() { sed -n "s/.*\"$1\":\"\\([^\"]*\\)\".*/\\1/p"; }

step "1. labeled rows: invented invoices (put your own CSV here: feature columns, the label, event_time, optional id)"
"$UNDERSTUDY" demo --write-csv "$WORK/invoices.csv" --rows 2000
head -3 "$WORK/invoices.csv"

step "2. init: guess the label, the event time and the features from the CSV"
"$UNDERSTUDY" init "$WORK/understudy.toml" --from-csv "$WORK/invoices.csv" --force

step "3. serve on $BASE"
"$UNDERSTUDY" serve --config "$WORK/understudy.toml" --listen "127.0.0.1:$PORT" \
  --data "$WORK/store" >"$WORK/server.log" 2>&1 &
echo $! >"$WORK/server.pid"
if [ "$keep" -eq 0 ]; then
  trap 'kill "$(cat "$WORK/server.pid")" 2>/dev/null || true' EXIT
fi
for _ in $(seq 150); do
  if curl --silent --fail "$BASE/healthz" >/dev/null 2>&1; then break; fi
  if ! kill -0 "$(cat "$WORK/server.pid")" 2>/dev/null; then
    echo "the server exited; its log:" >&2
    cat "$WORK/server.log" >&2
    exit 1
  fi
  sleep 0.1
done
call "$BASE/healthz"

step "4. labeled history: the CSV in bulk (POST /v1/examples in batches), then one example by hand"
"$UNDERSTUDY" import "$WORK/invoices.csv" --config "$WORK/understudy.toml" --server "$BASE"
now=$(date -u +%Y-%m-%dT%H:%M:%SZ)
call -X POST "$BASE/v1/examples" -H 'content-type: application/json' -d '[
  {"id": "walkthrough-1", "event_time": "'"$now"'", "label": 1,
   "features": {"invoice_amount": 48200, "days_to_due": 60, "debtor_years_trading": 2.5,
                "prior_late_invoices": 3, "credit_utilisation": 0.95,
                "debtor_sector": "construction", "submission_channel": "email"}}]'

step "5. retrain: cross-validate the grid, fit, gate against the active model"
# The first model has no incumbent to beat. The guessed config keeps the starter's schedule
# (schedule.new_labels = 2000), so the import may already have started a run that promoted
# one; this run is then judged against it and may well be kept.
run=$(call -X POST "$BASE/v1/retrain" -H 'content-type: application/json' -d '{}')
echo "$run"
run_id=$(echo "$run" | member run_id)
verdict=""
for _ in $(seq 600); do
  answer=$(call "$BASE/v1/runs/$run_id")
  if echo "$answer" | grep -q '"state":"finished"'; then
    verdict=$(echo "$answer" | member verdict)
    break
  fi
  sleep 0.2
done
echo "run $run_id: ${verdict:-not finished}"
[ -n "$verdict" ] || { echo "run $run_id did not finish" >&2; exit 1; }
call "$BASE/v1/models" | grep -o '"active":"[^"]*"' \
  || { echo "no active model after the run" >&2; exit 1; }

step "6. score an invoice"
scored=$(call -X POST "$BASE/v1/score" -H 'content-type: application/json' -d '{
  "features": {"invoice_amount": 12500, "days_to_due": 30, "debtor_years_trading": 4,
               "prior_late_invoices": 1, "credit_utilisation": 0.4,
               "debtor_sector": "retail", "submission_channel": "portal"}}')
echo "$scored"
score_id=$(echo "$scored" | member score_id)

step "7. its outcome, once known (1 = paid more than 30 days late)"
call -X POST "$BASE/v1/outcomes" -H 'content-type: application/json' \
  -d '{"score_id": "'"$score_id"'", "label": 0}'

step "8. the promotion log"
"$UNDERSTUDY" log --server "$BASE" --limit 5

if [ "$keep" -eq 1 ]; then
  echo
  echo "the server is still running at $BASE (pid $(cat "$WORK/server.pid"), data in $WORK/store)"
fi
