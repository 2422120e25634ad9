"""Scores rows with an independent PMML evaluator and compares them with the service's outputs.

Run by `tests/it/pmml.rs` with the venv `tests/pmml/setup.sh` makes. For each case directory
given on the command line it reads

- `model.pmml`, the document `understudy` exported (PMML 4.4, DMG specification:
  https://dmg.org/pmml/v4-4-1/GeneralStructure.html);
- `rows.csv`, one row per request: the features as sent (an empty cell is a missing value),
  `accepted` (1 if the service scored the row, 0 if it refused it) and `expected` (the
  service's probability of 1, or its predicted number).

It validates the document against the PMML 4.4 XML Schema shipped inside the evaluator's own
`pmml-model` jar (JPMML's copy of the DMG schema, namespace http://www.dmg.org/PMML-4_4), then
evaluates every row with JPMML-Evaluator (PyPI `jpmml_evaluator`, on a Java runtime through
JPype). It prints one JSON object per case; the Rust test asserts on them. It exits non-zero
only when it cannot run at all.
"""

import csv
import glob
import json
import math
import os
import sys
import time
import zipfile

from lxml import etree
import jpmml_evaluator
from jpmml_evaluator import make_evaluator

NS = {"p": "http://www.dmg.org/PMML-4_4"}


def pmml_schema():
    """The PMML 4.4 XSD from the pmml-model jar that jpmml_evaluator ships."""
    jars = glob.glob(
        os.path.join(os.path.dirname(jpmml_evaluator.__file__), "dependencies", "pmml-model-[0-9]*.jar")
    )
    if not jars:
        raise SystemExit("no pmml-model jar inside jpmml_evaluator; cannot validate against the XSD")
    with zipfile.ZipFile(jars[0]) as jar:
        xsd = jar.read("pmml.xsd")
    return os.path.basename(jars[0]), etree.XMLSchema(etree.fromstring(xsd))


def field_kinds(document):
    """DataDictionary fields: name -> optype."""
    return {
        f.get("name"): f.get("optype")
        for f in document.getroot().findall("p:DataDictionary/p:DataField", NS)
    }


def read_rows(path, kinds):
    rows = []
    with open(path, newline="") as f:
        for record in csv.DictReader(f):
            accepted = record.pop("accepted") == "1"
            expected = float(record.pop("expected")) if accepted else None
            features = {}
            for name, text in record.items():
                if text == "":
                    features[name] = None
                elif kinds.get(name) == "continuous":
                    features[name] = float(text)
                else:
                    features[name] = text
            rows.append((features, accepted, expected))
    return rows


def check(case, schema):
    started = time.monotonic()
    pmml_path = os.path.join(case, "model.pmml")
    document = etree.parse(pmml_path)
    valid = schema.validate(document)
    xsd_errors = [str(e) for e in schema.error_log][:5]
    kinds = field_kinds(document)
    # Leaves whose two classes have equal counts: there the service's tree votes 0, which the
    # document must say through the leaf's score.
    even_leaves = sum(
        1
        for node in document.getroot().iter("{%s}Node" % NS["p"])
        if len({d.get("recordCount") for d in node.findall("p:ScoreDistribution", NS)}) == 1
    )
    output = document.getroot().find(".//p:Output/p:OutputField", NS).get("name")

    evaluator = make_evaluator(pmml_path, backend="jpype", lax=False).verify()
    rows = read_rows(os.path.join(case, "rows.csv"), kinds)
    compared = 0
    max_abs_diff = 0.0
    worst = None
    refused_rows = 0
    refused_as_invalid = 0
    scored_refused = []
    failures = []
    for i, (features, accepted, expected) in enumerate(rows):
        try:
            result = evaluator.evaluate(features)
            value = result[output]
        except Exception as e:  # the evaluator's refusal of an invalid row
            if accepted:
                failures.append({"row": i, "error": str(e)[:300]})
            else:
                refused_rows += 1
                refused_as_invalid += 1
            continue
        if not accepted:
            refused_rows += 1
            # PMML's returnInvalid may also come back as a missing result.
            if value is None or (isinstance(value, float) and math.isnan(value)):
                refused_as_invalid += 1
            else:
                scored_refused.append({"row": i, "value": value})
            continue
        compared += 1
        if value is None:
            failures.append({"row": i, "error": "no value"})
            continue
        diff = abs(float(value) - expected)
        if not diff <= max_abs_diff:
            max_abs_diff = diff if not math.isnan(diff) else float("inf")
            worst = {"row": i, "pmml": float(value), "service": expected}
    return {
        "case": os.path.basename(case),
        "xsd_valid": bool(valid),
        "xsd_errors": xsd_errors,
        "rows_compared": compared,
        "max_abs_diff": max_abs_diff,
        "worst": worst,
        "failures": failures[:5],
        "failure_count": len(failures),
        "refused_rows": refused_rows,
        "refused_as_invalid": refused_as_invalid,
        "scored_refused": scored_refused[:5],
        "even_leaves": even_leaves,
        "distinct_outputs": len({e for _, a, e in rows if a}),
        "seconds": round(time.monotonic() - started, 3),
    }


def main():
    if len(sys.argv) < 2:
        raise SystemExit("usage: evaluate.py CASE_DIR...")
    started = time.monotonic()
    jar, schema = pmml_schema()
    for case in sys.argv[1:]:
        report = check(case, schema)
        report["xsd_source"] = jar
        print(json.dumps(report), flush=True)
    print(
        json.dumps({"evaluator": "jpmml_evaluator " + jpmml_evaluator.__version__,
                    "total_seconds": round(time.monotonic() - started, 3)}),
        flush=True,
    )


if __name__ == "__main__":
    main()
