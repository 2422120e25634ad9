"""Parses an OpenMetrics text exposition from stdin with prometheus_client's own parser.

The parser (prometheus_client.openmetrics.parser, from the Prometheus project's Python client)
is strict: it refuses text without the final `# EOF`, samples that do not belong to their
family's type, counters without `_total`, duplicate families, and other breaches of the
OpenMetrics 1.0 text format. On success it prints the families as JSON; on a parse error it
exits 1 with the parser's message.

Usage: parse.py < exposition.txt
"""
import json
import sys

from prometheus_client.openmetrics.parser import text_string_to_metric_families

text = sys.stdin.read()
try:
    families = [
        {
            "name": family.name,
            "type": family.type,
            "help": family.documentation,
            "samples": [
                {"name": s.name, "labels": s.labels, "value": s.value} for s in family.samples
            ],
        }
        for family in text_string_to_metric_families(text)
    ]
except Exception as error:  # the parser raises ValueError and friends
    print(f"not OpenMetrics: {error!r}", file=sys.stderr)
    sys.exit(1)
json.dump(families, sys.stdout)
