#!/usr/bin/env python3
"""Parse a Prometheus text exposition from stdin with prometheus_client's parser (PyPI) and
check what the parser does not: histogram buckets are cumulative (non-decreasing in `le`),
and the +Inf bucket equals _count. Prints one JSON object: {"sample{labels}": value}.
Exit 1 with a message on any violation. Used by lineside's metrics tests."""

import json
import math
import sys

from prometheus_client.parser import text_string_to_metric_families


def key(name, labels):
    inner = ",".join(f'{k}="{v}"' for k, v in sorted(labels.items()))
    return f"{name}{{{inner}}}"


def main() -> int:
    text = sys.stdin.read()
    out = {}
    problems = []
    for fam in text_string_to_metric_families(text):
        buckets = {}
        counts = {}
        for s in fam.samples:
            out[key(s.name, s.labels)] = s.value
            if fam.type == "histogram":
                series = tuple(sorted((k, v) for k, v in s.labels.items() if k != "le"))
                if s.name.endswith("_bucket"):
                    buckets.setdefault(series, []).append((float(s.labels["le"]), s.value))
                elif s.name.endswith("_count"):
                    counts[series] = s.value
        for series, bs in buckets.items():
            bs.sort()
            values = [v for _, v in bs]
            if any(b > a for a, b in zip(values[1:], values)):
                problems.append(f"{fam.name}{dict(series)}: buckets decrease: {bs}")
            if not math.isinf(bs[-1][0]):
                problems.append(f"{fam.name}{dict(series)}: no +Inf bucket")
            elif bs[-1][1] != counts.get(series):
                problems.append(f"{fam.name}{dict(series)}: +Inf bucket {bs[-1][1]} != _count {counts.get(series)}")
    if problems:
        print("\n".join(problems), file=sys.stderr)
        return 1
    json.dump(out, sys.stdout)
    return 0


if __name__ == "__main__":
    sys.exit(main())
