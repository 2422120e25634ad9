#!/usr/bin/env bash
# Schemathesis against openapi.yaml and the live service.
#
# Installs the pinned Schemathesis into a venv under the target dir, builds and starts the real
# binary on a free loopback port with a temporary data dir and an operator key, backfills it
# over the API (tests/schemathesis/backfill.py: a promoted model, a shadowing candidate, live scores and
# outcomes), then lets Schemathesis generate requests for every operation in openapi.yaml and
# check each answer: no 5xx, a documented status, the documented content type, headers and body
# schema. Exits non-zero on any failure; the server is stopped on every exit.
#
# Environment: SCHEMATHESIS_MAX_EXAMPLES (test cases per operation in the fuzzing phase,
# default 200), SCHEMATHESIS_SEED (generation seed; fixed by default, though the cases still
# vary a little with the server's state, e.g. which runs are queued), CARGO_TARGET_DIR
# (default ./target).
set -euo pipefail
cd "$(dirname "$0")/../.."

here=tests/schemathesis
target="${CARGO_TARGET_DIR:-target}"
mkdir -p "$target"
target="$(cd "$target" && pwd)"
venv="$target/schemathesis-venv"
reports="$target/schemathesis-report"
max_examples="${SCHEMATHESIS_MAX_EXAMPLES:-200}"
seed="${SCHEMATHESIS_SEED:-20261201}"

# The venv is rebuilt whenever the pinned requirements change.
if ! cmp -s "$here/requirements.txt" "$venv/requirements.txt" 2>/dev/null; then
  echo "== schemathesis: installing $here/requirements.txt into $venv"
  rm -rf "$venv"
  python3 -m venv "$venv"
  "$venv/bin/pip" install --quiet --disable-pip-version-check -r "$here/requirements.txt"
  cp "$here/requirements.txt" "$venv/requirements.txt"
fi
"$venv/bin/schemathesis" --version

echo "== schemathesis: cargo build --locked --bin understudy"
cargo build --locked --bin understudy
binary="$target/debug/understudy"

work="$(mktemp -d)"
server_pid=""
stop_server() {
  local status=$?
  if [ -n "$server_pid" ] && kill -0 "$server_pid" 2>/dev/null; then
    kill -TERM "$server_pid"
    wait "$server_pid" || true
  fi
  if [ "$status" -ne 0 ] && [ -f "$work/server.log" ]; then
    mkdir -p "$reports"
    cp "$work/server.log" "$reports/server.log"
    echo "server log: $reports/server.log (last lines below)" >&2
    tail -n 20 "$work/server.log" >&2
  fi
  rm -rf "$work"
  exit "$status"
}
trap stop_server EXIT

# A fresh operator key for this run only; the config reads it from the environment.
UNDERSTUDY_SCHEMATHESIS_KEY="$(python3 -c 'import secrets; print(secrets.token_hex(24))')"
export UNDERSTUDY_SCHEMATHESIS_KEY

echo "== schemathesis: starting the service"
"$binary" serve --config "$here/understudy.toml" --listen 127.0.0.1:0 --data "$work/data" \
  --log-json >"$work/server.log" 2>&1 &
server_pid=$!
listen=""
for _ in $(seq 1 300); do
  listen="$(grep -o '"listen":"127\.0\.0\.1:[0-9]*"' "$work/server.log" | head -n 1 | cut -d'"' -f4 || true)"
  [ -n "$listen" ] && break
  if ! kill -0 "$server_pid" 2>/dev/null; then
    echo "the service exited before listening" >&2
    exit 1
  fi
  sleep 0.1
done
if [ -z "$listen" ]; then
  echo "the service did not start listening within 30 s" >&2
  exit 1
fi
base="http://$listen"
echo "service at $base"

echo "== schemathesis: backfilling"
"$venv/bin/python" "$here/backfill.py" "$base"

# Every check Schemathesis has but positive_data_acceptance: openapi.yaml describes the API for
# any config, so it cannot say which feature names, kinds and ranges (or which labels) this
# config accepts; a schema-valid body such as {"features": {}} is rightly a 422 here. The
# config-specific rules are covered by tests/it/scoring.rs and tests/it/labels.rs instead.
echo "== schemathesis run openapi.yaml --url $base (max $max_examples examples per operation)"
rm -rf "$reports"
mkdir -p "$reports"
started=$SECONDS
# Run from the report dir: Schemathesis keeps a cache (.schemathesis/) in its working dir.
spec="$PWD/openapi.yaml"
(cd "$reports" && "$venv/bin/schemathesis" run "$spec" \
  --url "$base" \
  --header "Authorization: Bearer $UNDERSTUDY_SCHEMATHESIS_KEY" \
  --checks all \
  --exclude-checks positive_data_acceptance \
  --max-examples "$max_examples" \
  --seed "$seed" \
  --request-timeout 30 \
  --generation-database none \
  --report junit,ndjson \
  --report-junit-path "$reports/junit.xml" \
  --report-ndjson-path "$reports/events.ndjson" \
  --no-color)
echo "schemathesis took $((SECONDS - started)) s"
"$venv/bin/python" "$here/summary.py" openapi.yaml "$reports/events.ndjson"

# A panic inside a handler can surface as a dropped connection rather than a 5xx; the log
# must hold none, and no internal error either.
if ! kill -0 "$server_pid" 2>/dev/null; then
  echo "the service died during the run" >&2
  exit 1
fi
if grep -E 'panicked|"level":"ERROR"' "$work/server.log" >&2; then
  echo "the service logged a panic or an internal error during the run (above)" >&2
  exit 1
fi
echo "schemathesis: passed; no panic or internal error in the service's log"
