"""Backfills a running understudy so every route has something real to answer with.

Used by tests/schemathesis/run.sh before Schemathesis runs. Over the HTTP API only:

1. backfills 1,500 labeled invoices of the invented scenario's first world and trains the first
   model: it waits for sign-off (the config's gate.sign_off) and is approved, so it is
   promoted and /v1/score answers 200;
2. backfills 3,000 later invoices of the changed world and trains again: the candidate must pass
   the holdout gate, wait, and once approved start shadowing (the config's shadow.outcomes is
   out of reach), so /v1/candidate shows a real candidate;
3. trains once more on the same rows: its candidate passes the gate against the same active
   model and is left waiting, so GET /v1/sign-off and its approve/decline links have a real
   run id;
3. scores 300 live invoices (so /v1/drift has a window) and sends outcomes for 60 of them (so
   the candidate's live metrics and the coverage table are filled).

The invoices are synthetic, drawn like src/demo/scenario.rs draws them (Harbourline Trade
Credit; the same features, two regimes), from a fixed seed. Any unexpected answer stops the
script with a non-zero exit.

Usage: backfill.py BASE_URL  (the key is read from UNDERSTUDY_SCHEMATHESIS_KEY)
"""

import json
import math
import os
import random
import sys
import time
import urllib.error
import urllib.request
from datetime import datetime, timedelta, timezone

SECTORS = ["construction", "retail", "wholesale", "logistics", "healthcare", "hospitality"]
CHANNELS = ["portal", "email", "edi"]
TERMS = [14.0, 30.0, 45.0, 60.0, 90.0]


def poisson(rng, mean):
    # Knuth's method; the mean is small.
    limit, k, p = math.exp(-mean), 0, 1.0
    while True:
        p *= rng.random()
        if p <= limit:
            return k
        k += 1


def invoice(rng, after):
    """One invoice's features and its true chance of being paid late."""
    amount = min(max(rng.lognormvariate(9.6, 1.0), 50.0), 4_900_000.0)
    days = rng.choice(TERMS)
    years = min(math.exp(rng.gauss(2.0, 0.9)), 150.0)
    late = poisson(rng, 0.8)
    utilisation = rng.uniform(0.0, 1.25)
    sector = rng.randrange(len(SECTORS))
    channel = rng.randrange(len(CHANNELS))
    log_amount = math.log(amount / 15_000.0)
    channel_effect = [0.0, 0.25, -0.15][channel]
    if not after:
        logit = (-1.7 + 0.25 * log_amount + 0.01 * (days - 30.0) - 0.3 * math.log(years)
                 + 0.6 * late + 1.6 * (utilisation - 0.6)
                 + [0.5, 0.1, 0.0, -0.2, -0.5, 0.3][sector] + channel_effect)
    else:
        logit = (-1.9 + 0.25 * log_amount + 0.04 * (days - 30.0) - 0.1 * math.log(years)
                 + 0.2 * late - 0.4 * (utilisation - 0.6)
                 + [1.6, -0.4, 1.1, -0.3, -1.0, 1.4][sector] + channel_effect)
    features = {
        "invoice_amount": round(amount, 2),
        "days_to_due": days,
        # Some debtors' trading history is unknown (imputed by the model).
        "debtor_years_trading": None if rng.random() < 0.05 else round(years, 1),
        "credit_utilisation": round(utilisation, 3),
        "debtor_sector": SECTORS[sector],
        "submission_channel": CHANNELS[channel],
    }
    # Some backends leave out a zero count (the config fills 0).
    if late > 0 or rng.random() < 0.7:
        features["prior_late_invoices"] = late
    return features, 1.0 / (1.0 + math.exp(-logit))


class Api:
    def __init__(self, base, key):
        self.base = base.rstrip("/")
        self.key = key

    def call(self, method, path, body=None, expect=(200,)):
        data = None if body is None else json.dumps(body).encode()
        request = urllib.request.Request(self.base + path, data=data, method=method)
        request.add_header("Authorization", f"Bearer {self.key}")
        if data is not None:
            request.add_header("Content-Type", "application/json")
        try:
            with urllib.request.urlopen(request, timeout=60) as response:
                status, text = response.status, response.read()
        except urllib.error.HTTPError as e:
            status, text = e.code, e.read()
        if status not in expect:
            sys.exit(f"backfill: {method} {path} answered {status}, expected {expect}: {text[:500]!r}")
        return json.loads(text) if text else None


def backfill(api, rng, n, after, start, tag):
    rows = []
    for i in range(n):
        features, p = invoice(rng, after)
        at = start + timedelta(seconds=i)
        rows.append({
            "features": features,
            "label": 1 if rng.random() < p else 0,
            "event_time": at.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "id": f"{tag}-{i}",
        })
    for chunk in range(0, n, 1000):
        ack = api.call("POST", "/v1/examples", rows[chunk:chunk + 1000])
        if ack["inserted"] != len(rows[chunk:chunk + 1000]):
            sys.exit(f"backfill: examples not all inserted: {ack}")


def retrain(api, want):
    queued = api.call("POST", "/v1/retrain", expect=(202,))
    run_id = queued["run_id"]
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        body = api.call("GET", f"/v1/runs/{run_id}")
        if body["run"]["state"] == "finished":
            entry = body["entry"]
            if entry["verdict"] != want:
                sys.exit(f"backfill: run {run_id} ended {entry['verdict']}, expected {want}: "
                         f"{entry['reason']}")
            print(f"backfill: run {run_id}: {entry['verdict']} ({entry['reason']})")
            return entry
        time.sleep(0.2)
    sys.exit(f"backfill: run {run_id} did not finish in 300 s")


def approve(api, waiting, want):
    """Signs off the waiting run's candidate; the decision's entry must say `want`."""
    run_id = waiting["run_id"]
    entry = api.call("POST", f"/v1/sign-off/{run_id}/approve",
                     {"reason": "seeded by the Schemathesis backfill"})["entry"]
    if entry["verdict"] != want:
        sys.exit(f"backfill: approving {run_id} gave {entry['verdict']}, expected {want}: "
                 f"{entry['reason']}")
    print(f"backfill: approved {run_id}: {entry['verdict']}")
    return entry


def main():
    base = sys.argv[1]
    api = Api(base, os.environ["UNDERSTUDY_SCHEMATHESIS_KEY"])
    rng = random.Random(20261201)
    now = datetime.now(timezone.utc).replace(microsecond=0)

    backfill(api, rng, 1500, after=False, start=now - timedelta(days=60), tag="before")
    first = approve(api, retrain(api, "waiting"), "promoted")
    backfill(api, rng, 3000, after=True, start=now - timedelta(days=30), tag="after")
    second = approve(api, retrain(api, "waiting"), "shadowing")
    third = retrain(api, "waiting")

    live = [invoice(rng, after=True) for _ in range(300)]
    items = [{"features": features, "ref": f"live-{i}"} for i, (features, _) in enumerate(live)]
    scored = api.call("POST", "/v1/score/batch", {"items": items})["results"]
    for result, (_, p) in zip(scored[:60], live):
        label = 1 if rng.random() < p else 0
        api.call("POST", "/v1/outcomes", {"score_id": result["score_id"], "label": label},
                 expect=(201,))
    candidate = api.call("GET", "/v1/candidate")
    if candidate["candidate"] is None or candidate["live"] is None:
        sys.exit(f"backfill: no shadowing candidate with live metrics: {candidate}")
    answered_by = {r["model_id"] for r in scored}
    if candidate["share"] is None or candidate["candidate"]["id"] not in answered_by:
        sys.exit(f"backfill: the candidate answers no share of the live scores: {candidate}")
    waiting = api.call("GET", "/v1/sign-off")["waiting"]
    if waiting is None or waiting["run_id"] != third["run_id"]:
        sys.exit(f"backfill: run {third['run_id']} is not waiting for sign-off: {waiting}")
    print(f"backfill: active {first['active_after']}, shadowing {second['candidate_id']}, "
          f"waiting {third['candidate_id']} (run {third['run_id']}), "
          f"{len(scored)} live scores, {candidate['outcomes']} shadowed outcomes")


if __name__ == "__main__":
    main()
