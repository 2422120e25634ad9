#!/usr/bin/env python3
"""A small understudy client in Python, standard library only (urllib).

It scores invented invoices of the Harbourline Trade Credit scenario (the chance the debtor
pays more than 30 days late), then reports their outcomes. A server that is busy answers 503
with a Retry-After header (load shedding, or a store that cannot take writes for a moment);
the client waits as long as it says and tries again, a bounded number of times. Use the class
`Client` from your own code; run the file to try it against a server:

    python3 examples/client.py --server http://127.0.0.1:8080 [--key KEY] [--count 20]

The server needs an active model (see examples/walkthrough.sh). Every score here is recorded
by the server; the outcomes are invented too, so run it against a trial server, not one whose
models matter.
"""

import argparse
import email.utils
import json
import os
import random
import sys
import time
import urllib.error
import urllib.request


class Refused(Exception):
    """The server refused a request: its status and its problem detail (RFC 9457)."""

    def __init__(self, status, problem):
        self.status = status
        self.problem = problem
        detail = problem.get("detail") if isinstance(problem, dict) else None
        super().__init__(f"HTTP {status}: {detail or problem}")


class Client:
    """Calls one understudy server. `sleep` is replaceable so tests need not wait."""

    def __init__(self, base, key=None, attempts=5, default_wait=1.0, max_wait=30.0,
                 timeout=30.0, sleep=time.sleep):
        self.base = base.rstrip("/")
        self.key = key
        self.attempts = attempts
        self.default_wait = default_wait
        self.max_wait = max_wait
        self.timeout = timeout
        self.sleep = sleep

    def wait_for(self, retry_after):
        """Seconds to wait for a Retry-After value (delay-seconds or an HTTP date)."""
        if retry_after is None:
            return self.default_wait
        value = retry_after.strip()
        if value.isdigit():
            return min(float(value), self.max_wait)
        try:
            when = email.utils.parsedate_to_datetime(value)
        except (TypeError, ValueError):
            return self.default_wait
        return min(max(when.timestamp() - time.time(), 0.0), self.max_wait)

    def call(self, method, path, body=None):
        """One request; a 503 is retried as Retry-After asks, up to `attempts` tries."""
        data = None if body is None else json.dumps(body).encode()
        headers = {"accept": "application/json"}
        if data is not None:
            headers["content-type"] = "application/json"
        if self.key:
            headers["authorization"] = f"Bearer {self.key}"
        for attempt in range(1, self.attempts + 1):
            request = urllib.request.Request(self.base + path, data=data, method=method,
                                             headers=headers)
            try:
                with urllib.request.urlopen(request, timeout=self.timeout) as response:
                    return json.load(response)
            except urllib.error.HTTPError as error:
                text = error.read().decode("utf-8", "replace")
                try:
                    problem = json.loads(text)
                except ValueError:
                    problem = text
                if error.code == 503 and attempt < self.attempts:
                    wait = self.wait_for(error.headers.get("Retry-After"))
                    print(f"server busy (503) on {method} {path}; retrying in {wait:g} s "
                          f"(attempt {attempt + 1} of {self.attempts})", file=sys.stderr)
                    self.sleep(wait)
                    continue
                raise Refused(error.code, problem) from None
        raise AssertionError("unreachable: the last attempt returns or raises")

    def score(self, features):
        return self.call("POST", "/v1/score", {"features": features})

    def outcome(self, score_id, label):
        return self.call("POST", "/v1/outcomes", {"score_id": score_id, "label": label})

    def examples(self, rows):
        return self.call("POST", "/v1/examples", rows)

    def models(self):
        return self.call("GET", "/v1/models")


SECTORS = ["construction", "retail", "wholesale", "logistics", "healthcare", "hospitality"]
CHANNELS = ["portal", "email", "edi"]


def invented_invoice(rng):
    """One invented invoice of the scenario, with values inside the usual ranges."""
    return {
        "invoice_amount": round(rng.uniform(1_000, 100_000), 2),
        "days_to_due": rng.choice([14, 30, 45, 60, 90]),
        "debtor_years_trading": round(rng.uniform(1, 40), 1),
        "prior_late_invoices": rng.randint(0, 3),
        "credit_utilisation": round(rng.uniform(0.05, 1.2), 3),
        "debtor_sector": rng.choice(SECTORS),
        "submission_channel": rng.choice(CHANNELS),
    }


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--server", default=os.environ.get("UNDERSTUDY_SERVER",
                                                           "http://127.0.0.1:8080"))
    parser.add_argument("--key", default=os.environ.get("UNDERSTUDY_KEY"))
    parser.add_argument("--count", type=int, default=20)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()

    client = Client(args.server, key=args.key)
    rng = random.Random(args.seed)
    try:
        active = client.models().get("active")
        print(f"active model: {active}")
        scored = []
        for _ in range(args.count):
            answer = client.score(invented_invoice(rng))
            probability = answer["probability"]
            if not 0.0 <= probability <= 1.0:
                raise SystemExit(f"probability out of [0, 1]: {answer}")
            scored.append((answer["score_id"], probability))
            print(f"{answer['score_id']}  p(late) = {probability:.3f}  model {answer['model_id']}")
        # Later, when each invoice is settled: its outcome (invented here from the score).
        for score_id, probability in scored:
            answer = client.outcome(score_id, 1 if rng.random() < probability else 0)
            if answer.get("duplicate"):
                raise SystemExit(f"outcome for {score_id} was already recorded")
        print(f"scored {len(scored)} invoices and sent their outcomes")
    except Refused as refused:
        print(f"error: {refused}", file=sys.stderr)
        return 1
    except urllib.error.URLError as error:
        print(f"error: cannot reach {args.server}: {error.reason}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
