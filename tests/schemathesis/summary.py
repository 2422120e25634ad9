"""Summarizes a Schemathesis NDJSON report: responses per operation by status code.

Used by tests/schemathesis/run.sh after the run, so the log shows which answers of each
operation were actually checked (a 2xx body is only checked against its schema if some
request got one). Exits non-zero if any response was a 5xx.

Usage: summary.py openapi.yaml REPORT.ndjson
"""

import collections
import json
import re
import sys
import urllib.parse

import yaml


def templates(spec_path):
    """(regex, "METHOD template") for every documented operation."""
    with open(spec_path, encoding="utf-8") as f:
        spec = yaml.safe_load(f)
    out = []
    for path, item in spec["paths"].items():
        parts = re.split(r"\{[^}]+\}", path)
        pattern = re.compile("^" + "[^/]+".join(map(re.escape, parts)) + "$")
        for method in item:
            out.append((method.upper(), pattern, f"{method.upper()} {path}"))
    return out


def main():
    operations = templates(sys.argv[1])
    statuses = collections.defaultdict(collections.Counter)
    for line in open(sys.argv[2], encoding="utf-8"):
        event = json.loads(line)
        finished = event.get("ScenarioFinished")
        if not finished:
            continue
        recorder = finished["recorder"]
        for interaction in recorder.get("interactions", {}).values():
            response = interaction.get("response")
            if response is None:
                continue
            # Stateful scenarios record several operations under one label: name each
            # response by its request's method and documented path.
            method = interaction["request"]["method"]
            path = urllib.parse.urlsplit(interaction["request"]["uri"]).path
            operation = next((name for m, pattern, name in operations
                              if m == method and pattern.match(path)), None)
            if operation is None:
                # Schemathesis also tries every path with methods it does not list (a 405).
                operation = "(a method the path does not take)"
            statuses[operation][response["status_code"]] += 1
    total = sum(sum(c.values()) for c in statuses.values())
    server_errors = sum(n for c in statuses.values() for s, n in c.items() if s >= 500)
    print(f"responses checked: {total} ({server_errors} of them 5xx)")
    for operation in sorted(statuses):
        counts = ", ".join(f"{s}: {n}" for s, n in sorted(statuses[operation].items()))
        print(f"  {operation:<28} {counts}")
    if server_errors:
        sys.exit(1)


if __name__ == "__main__":
    main()
