#!/usr/bin/env bash
# Installs what the PMML round-trip test (tests/it/pmml.rs) needs, idempotently:
# - a Java runtime (Debian's default-jre-headless) when `java` is not on PATH;
# - the pinned evaluator (tests/pmml/requirements.txt) in a venv at <target>/pmml-venv, rebuilt
#   only when the requirements change.
# .ci/run calls it before `cargo test`. Environment: CARGO_TARGET_DIR (default ./target).
set -euo pipefail
cd "$(dirname "$0")/../.."

here=tests/pmml
target="${CARGO_TARGET_DIR:-target}"
mkdir -p "$target"
target="$(cd "$target" && pwd)"
venv="$target/pmml-venv"

if ! java -version >/dev/null 2>&1; then
  echo "== pmml: installing default-jre-headless (the evaluator runs on Java)"
  if [ "$(id -u)" -eq 0 ]; then as_root=""; else as_root="sudo"; fi
  $as_root apt-get update -q
  DEBIAN_FRONTEND=noninteractive $as_root apt-get install -y -q --no-install-recommends \
    default-jre-headless
fi

if ! cmp -s "$here/requirements.txt" "$venv/requirements.txt" 2>/dev/null; then
  echo "== pmml: installing $here/requirements.txt into $venv"
  rm -rf "$venv"
  python3 -m venv "$venv"
  "$venv/bin/pip" install --quiet --disable-pip-version-check -r "$here/requirements.txt"
  cp "$here/requirements.txt" "$venv/requirements.txt"
fi
"$venv/bin/python" -c "import jpmml_evaluator, lxml; print('pmml evaluator: jpmml_evaluator', jpmml_evaluator.__version__)"
