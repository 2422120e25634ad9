#!/usr/bin/env bash
# `understudy train` end to end against scikit-learn's LogisticRegressionCV on one generated
# CSV, both reading the file themselves, one thread each, in alternating rounds.
#
#   bash benches/train_compare.sh                 # 100,000 x 30, 3 rounds per penalty
#   ROWS=20000 ROUNDS=1 bash benches/train_compare.sh
#   REPEATS=2 PENALTIES=l2 bash benches/train_compare.sh   # understudy's default: 2 x 5 folds
#   UNDERSTUDY_BIN=/tmp/before/understudy REPORT=train_compare_before bash benches/train_compare.sh
#
# The data are invented (standard-normal columns, ten with a true effect, ascending event
# times). Both sides hold out the latest 20 % by event time, run 5-fold stratified CV over the
# same 10 lambdas (understudy's automatic path, read from its first run) and score the holdout:
# L2 (scikit-learn lbfgs) and elastic net l1_ratio 0.5 (scikit-learn saga). understudy's time
# is the whole process (`/usr/bin/time -v`: wall clock and peak RSS); scikit-learn's is from
# `pandas.read_csv` to the holdout AUC inside its process (interpreter start and imports not
# counted). understudy runs one 5-fold split (`training.repeats = 1`), the fits scikit-learn's
# cv=5 makes; REPEATS=2 is understudy's default of two shuffled 5-fold splits, twice the fits.
# scikit-learn 1.9.1 and pandas go in a venv under target/. Report:
# target/bench-reports/train_compare.{json,md}. No timing is asserted anywhere.
set -euo pipefail
cd "$(dirname "$0")/.."

ROWS=${ROWS:-100000}
ROUNDS=${ROUNDS:-3}
REPEATS=${REPEATS:-1}
work=target/train-compare
venv=target/train-compare-venv
mkdir -p "$work" target/bench-reports

if [ ! -x /usr/bin/time ]; then
  if [ "$(id -u)" -eq 0 ]; then as_root=""; else as_root="sudo"; fi
  $as_root apt-get update -q
  DEBIAN_FRONTEND=noninteractive $as_root apt-get install -y -q --no-install-recommends time
fi
if ! "$venv/bin/python" -c "import sklearn, pandas" >/dev/null 2>&1; then
  echo "== scikit-learn and pandas into $venv"
  python3 -m venv "$venv"
  "$venv/bin/pip" install -q "scikit-learn==1.9.1" "pandas>=2,<4"
fi
py="$venv/bin/python"

# UNDERSTUDY_BIN runs another build of the binary (an earlier commit's, for a before/after).
if [ -z "${UNDERSTUDY_BIN:-}" ]; then
  echo "== building (release)"
  cargo build --release --locked --bin understudy
fi
bin=${UNDERSTUDY_BIN:-target/release/understudy}

csv="$work/labeled_${ROWS}x30.csv"
if [ ! -f "$csv" ]; then
  echo "== writing $csv"
  "$py" - "$csv" "$ROWS" <<'PY'
import sys, time
import numpy as np, pandas as pd
path, n = sys.argv[1], int(sys.argv[2])
rng = np.random.default_rng(7)
x = rng.standard_normal((n, 30))
z = -0.5 + x[:, :10] @ (0.8 - 0.15 * np.arange(10))
y = (rng.random(n) < 1 / (1 + np.exp(-z))).astype(int)
end = int(time.time()) - 86400
times = pd.to_datetime(end - 60 * (n - np.arange(n)), unit="s", utc=True)
frame = pd.DataFrame(x, columns=[f"x{j:02d}" for j in range(30)])
frame.insert(0, "event_time", times.strftime("%Y-%m-%dT%H:%M:%SZ"))
frame.insert(0, "id", [f"r{i}" for i in range(n)])
frame["y"] = y
frame.to_csv(path, index=False, float_format="%.10g")
PY
fi

config() { # penalty l1_ratio_line
  printf '[label]\nname = "y"\n\n[training]\nwindow_rows = 10000000\nholdout_fraction = 0.2\n'
  # The best mean AUC, as LogisticRegressionCV chooses (not the one-standard-error rule).
  printf 'folds = 5\nrepeats = %s\nmin_rows = 500\nworkers = 1\nselection = "best"\n\n' "$REPEATS"
  printf '[[training.families]]\nfamily = "logistic"\npenalty = "%s"\n%blambda_count = 10\n\n' "$1" "$2"
  printf '[gate]\nmetric = "auc"\nmargin = 0.02\nmin_rows = 200\n'
  for j in $(seq -w 0 29); do
    printf '\n[[features]]\nname = "x%s"\nkind = "number"\nmin = -100\nmax = 100\n' "$j"
  done
}
config l2 "" > "$work/l2.toml"
config elastic_net 'l1_ratio = [0.5]\n' > "$work/enet.toml"

results="$work/results.jsonl"
: > "$results"
ours() { # name config round
  local out="$work/ours_$1_$3"
  /usr/bin/time -v -o "$out.time" "$bin" train --config "$2" --data "$csv" --json > "$out.json"
  "$py" - "$1" "$3" "$out.json" "$out.time" >> "$results" <<'PY'
import json, sys, re
name, rnd, entry_path, time_path = sys.argv[1:5]
entry = json.load(open(entry_path))
text = open(time_path).read()
wall = re.search(r"Elapsed \(wall clock\) time \(h:mm:ss or m:ss\): (\S+)", text).group(1)
seconds = sum(float(p) * 60 ** i for i, p in enumerate(reversed(wall.split(":"))))
rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", text).group(1))
def lambdas(node, out):
    if isinstance(node, dict):
        for k, v in node.items():
            if k == "lambda" and isinstance(v, (int, float)):
                out.append(v)
            else:
                lambdas(v, out)
    elif isinstance(node, list):
        for v in node:
            lambdas(v, out)
    return out
path = lambdas([r["setting"] for r in entry["search"]], [])
print(json.dumps({"side": "understudy", "penalty": name, "round": int(rnd), "seconds": seconds,
                  "peak_rss_bytes": rss_kb * 1024, "holdout_auc": entry["candidate_holdout"]["auc"],
                  "chosen": entry.get("chosen"), "lambdas": path}))
PY
  tail -1 "$results"
}
theirs() { # name l1_ratio round lambdas
  OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 /usr/bin/time -v -o "$work/theirs_$1_$3.time" \
    "$py" benches/reference/train_compare.py --csv "$csv" --l1-ratio "$2" --lambdas "$4" \
    > "$work/theirs_$1_$3.json"
  "$py" - "$1" "$3" "$work/theirs_$1_$3.json" "$work/theirs_$1_$3.time" >> "$results" <<'PY'
import json, sys, re
name, rnd, out_path, time_path = sys.argv[1:5]
out = json.loads(open(out_path).read().strip().splitlines()[-1])
rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", open(time_path).read()).group(1))
out.update({"side": "scikit-learn", "penalty": name, "round": int(rnd),
            "seconds": out["seconds_total"], "peak_rss_bytes": rss_kb * 1024})
print(json.dumps(out))
PY
  tail -1 "$results"
}

for penalty in ${PENALTIES:-l2 enet}; do
  cfg="$work/$penalty.toml"
  a=0; [ "$penalty" = enet ] && a=0.5
  echo "== $penalty: $ROUNDS alternating rounds"
  for r in $(seq 1 "$ROUNDS"); do
    if [ $((r % 2)) -eq 1 ]; then
      ours "$penalty" "$cfg" "$r"
      lambdas=$("$py" -c "import json,sys; print(','.join(repr(l) for l in json.loads(sys.stdin.readline())['lambdas']))" < <(tail -1 "$results"))
      theirs "$penalty" "$a" "$r" "$lambdas"
    else
      theirs "$penalty" "$a" "$r" "$lambdas"
      ours "$penalty" "$cfg" "$r"
    fi
  done
done

"$py" - "$results" "$ROWS" "${REPORT:-train_compare}" "$REPEATS" <<'PY'
import json, sys, statistics, os, datetime
rows = [json.loads(l) for l in open(sys.argv[1]) if l.strip()]
n = int(sys.argv[2])
report_name = sys.argv[3]
repeats = int(sys.argv[4])
matrix = n * 30 * 8
report = {"date": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
          "rows": n, "repeats": repeats, "matrix_bytes": matrix, "loadavg_at_end": os.getloadavg(), "runs": rows,
          "penalties": {}}
lines = [f"# understudy train ({repeats} x 5 folds) vs scikit-learn (5 folds), {n:,} x 30 ({report['date']}, load average at end {report['loadavg_at_end'][0]:.2f})", "",
         "| penalty | round | understudy | scikit-learn (solver) | ratio | holdout AUC ours / theirs | understudy peak RSS |",
         "| --- | ---: | ---: | ---: | ---: | ---: | ---: |"]
for penalty in [p for p in ("l2", "enet") if any(r["penalty"] == p for r in rows)]:
    ours = {r["round"]: r for r in rows if r["side"] == "understudy" and r["penalty"] == penalty}
    theirs = {r["round"]: r for r in rows if r["side"] == "scikit-learn" and r["penalty"] == penalty}
    ratios = []
    for k in sorted(ours):
        o, t = ours[k], theirs[k]
        ratios.append(o["seconds"] / t["seconds"])
        lines.append(f"| {penalty} | {k} | {o['seconds']:.2f} s | {t['seconds']:.2f} s ({t['solver']}; read {t['seconds_read']:.2f} s) | {ratios[-1]:.3f} | {o['holdout_auc']:.5f} / {t['holdout_auc']:.5f} | {o['peak_rss_bytes']/1e6:.1f} MB ({o['peak_rss_bytes']/matrix:.2f} x) |")
    o_secs = [o["seconds"] for o in ours.values()]
    t_secs = [t["seconds"] for t in theirs.values()]
    report["penalties"][penalty] = {
        "ratio_median": statistics.median(ratios), "ratios": ratios,
        "understudy_seconds": o_secs, "sklearn_seconds": t_secs,
        "auc_difference": max(abs(ours[k]["holdout_auc"] - theirs[k]["holdout_auc"]) for k in ours),
        "peak_rss_over_matrix": max(o["peak_rss_bytes"] for o in ours.values()) / matrix,
    }
    p = report["penalties"][penalty]
    lines.append(f"| {penalty} | median | | | **{p['ratio_median']:.3f}** | max difference {p['auc_difference']:.1e} | max {p['peak_rss_over_matrix']:.2f} x |")
json.dump(report, open(f"target/bench-reports/{report_name}.json", "w"), indent=2)
open(f"target/bench-reports/{report_name}.md", "w").write("\n".join(lines) + "\n")
print("\n".join(lines))
PY
