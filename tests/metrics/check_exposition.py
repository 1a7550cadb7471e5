#!/usr/bin/env python3
"""Reads a convoy /metrics page with the Prometheus project's own parser and checks it.

The parser is prometheus_client.parser.text_string_to_metric_families, from the Prometheus
Python client (requirements.txt pins the version): a reader of the text format that no one
here wrote. The rules checked beyond "it parses" come from the Prometheus documentation,
"Exposition formats" (content type text/plain; version=0.0.4, histograms as cumulative
_bucket series ending in le="+Inf" equal to _count, plus _sum); the families, types and
labels are the ones convoy promises (src/telemetry/mod.rs).

Usage:
  check_exposition.py (--url URL | --file FILE) --model M --version V
                      [--ok-requests N] [--ok-samples N] [--failed-requests N]
Exits non-zero with a message on the first failed check; prints a summary otherwise.
"""

import argparse
import math
import sys
import urllib.request
from collections import defaultdict

from prometheus_client.parser import text_string_to_metric_families

# name (as exposed), type, label names besides `le`
FAMILIES = [
    ("convoy_requests_total", "counter", {"model", "version", "code"}),
    ("convoy_samples_total", "counter", {"model", "version", "code"}),
    ("convoy_request_duration_seconds", "histogram", {"model"}),
    ("convoy_queue_wait_seconds", "histogram", {"model", "version"}),
    ("convoy_batch_compute_seconds", "histogram", {"model", "version"}),
    ("convoy_batch_size", "histogram", {"model", "version"}),
    ("convoy_batches_total", "counter", {"model", "version", "outcome"}),
    ("convoy_queued_samples", "gauge", {"model", "version"}),
    ("convoy_requests_in_flight", "gauge", set()),
    ("convoy_image_prepare_seconds", "histogram", {"model"}),
    ("convoy_model_loads_total", "counter", {"model", "outcome"}),
    ("convoy_model_active_version", "gauge", {"model", "version"}),
    ("convoy_model_swap_seconds", "histogram", {"model"}),
    # The demo's bundle carries a drift reference, so its drift series are on the page.
    ("convoy_drift_samples_total", "counter", {"model", "version"}),
    ("convoy_drift_values_total", "counter", {"model", "version", "statistic", "bin"}),
    ("convoy_drift_out_of_range_total", "counter", {"model", "version", "statistic"}),
    ("convoy_drift_non_finite_total", "counter", {"model", "version", "statistic"}),
    ("convoy_drift_predictions_total", "counter", {"model", "version", "class"}),
    ("convoy_drift_psi", "gauge", {"model", "version", "statistic"}),
    ("convoy_drift_p_value", "gauge", {"model", "version", "statistic"}),
    ("convoy_drift_verdict", "gauge", {"model", "version", "statistic"}),
    ("convoy_drift_window_samples", "gauge", {"model", "version"}),
    ("convoy_requests_shed_total", "counter", {"model", "version", "reason"}),
]

# The canonical gRPC status code names (grpc/grpc, doc/statuscodes.md).
GRPC_CODES = {
    "OK", "CANCELLED", "UNKNOWN", "INVALID_ARGUMENT", "DEADLINE_EXCEEDED", "NOT_FOUND",
    "ALREADY_EXISTS", "PERMISSION_DENIED", "RESOURCE_EXHAUSTED", "FAILED_PRECONDITION",
    "ABORTED", "OUT_OF_RANGE", "UNIMPLEMENTED", "INTERNAL", "UNAVAILABLE", "DATA_LOSS",
    "UNAUTHENTICATED",
}


class CheckFailed(Exception):
    pass


def check(condition, message):
    if not condition:
        raise CheckFailed(message)


def fetch(url):
    with urllib.request.urlopen(url, timeout=10) as r:
        check(r.status == 200, f"GET {url}: status {r.status}")
        content_type = r.headers.get("Content-Type", "")
        check(
            content_type.startswith("text/plain; version=0.0.4"),
            f"GET {url}: Content-Type {content_type!r}",
        )
        return r.read().decode("utf-8")


def family_key(name, typ):
    # The parser names a counter family without its `_total` suffix (the OpenMetrics
    # convention); the exposed sample names keep it.
    if typ == "counter" and name.endswith("_total"):
        return name[: -len("_total")]
    return name


def value(samples, name, **labels):
    found = [
        s for s in samples
        if s.name == name and all(s.labels.get(k) == v for k, v in labels.items())
    ]
    check(len(found) == 1, f"{name}{labels}: {len(found)} samples, expected 1")
    return found[0].value


def total(samples, name, **labels):
    return sum(
        s.value for s in samples
        if s.name == name and all(s.labels.get(k) == v for k, v in labels.items())
    )


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    src = ap.add_mutually_exclusive_group(required=True)
    src.add_argument("--url")
    src.add_argument("--file")
    ap.add_argument("--model", required=True)
    ap.add_argument("--version", required=True)
    ap.add_argument("--ok-requests", type=int)
    ap.add_argument("--ok-samples", type=int)
    ap.add_argument("--failed-requests", type=int)
    args = ap.parse_args()

    text = fetch(args.url) if args.url else open(args.file, encoding="utf-8").read()
    check(text.endswith("\n"), "the last line must end with a line feed")
    families = {f.name: f for f in text_string_to_metric_families(text)}
    all_samples = [s for f in families.values() for s in f.samples]

    print(f"{'family':<36} {'type':<10} {'labels':<28} samples")
    for name, typ, labels in FAMILIES:
        key = family_key(name, typ)
        check(key in families, f"family {name} missing (parsed: {sorted(families)})")
        fam = families[key]
        check(fam.type == typ, f"{name}: type {fam.type}, expected {typ}")
        check(fam.documentation.strip(), f"{name}: no HELP text")
        check(fam.samples, f"{name}: no samples")
        for s in fam.samples:
            got = set(s.labels) - ({"le"} if s.name.endswith("_bucket") else set())
            check(got == labels, f"{s.name}: labels {sorted(got)}, expected {sorted(labels)}")
            check(not math.isnan(s.value), f"{s.name}{s.labels} is NaN")
            if "code" in s.labels:
                check(s.labels["code"] in GRPC_CODES, f"{s.name}: code {s.labels['code']}")
        if typ == "histogram":
            check_histogram(name, fam.samples)
        print(f"{name:<36} {typ:<10} {','.join(sorted(labels)) or '-':<28} {len(fam.samples)}")
    unexpected = set(families) - {family_key(n, t) for n, t, _ in FAMILIES}
    check(not unexpected, f"families not in convoy's list: {sorted(unexpected)}")

    m, v = args.model, args.version
    ok = dict(model=m, version=v, code="OK")
    if args.ok_requests is not None:
        got = value(all_samples, "convoy_requests_total", **ok)
        check(got == args.ok_requests, f"requests_total{ok} = {got}, expected {args.ok_requests}")
    if args.ok_samples is not None:
        got = value(all_samples, "convoy_samples_total", **ok)
        check(got == args.ok_samples, f"samples_total{ok} = {got}, expected {args.ok_samples}")
    if args.failed_requests is not None:
        failed = total(all_samples, "convoy_requests_total") - total(
            all_samples, "convoy_requests_total", code="OK")
        check(failed == args.failed_requests,
              f"{failed} failed requests counted, expected {args.failed_requests}")
    check(value(all_samples, "convoy_model_active_version", model=m, version=v) == 1,
          "active version gauge")
    check(value(all_samples, "convoy_model_loads_total", model=m, outcome="ok") == 1,
          "one load of the model")
    check(value(all_samples, "convoy_requests_in_flight") == 0, "requests still in flight")
    for reason in ("queue_full", "deadline", "cancelled"):
        value(all_samples, "convoy_requests_shed_total", model=m, version=v, reason=reason)
    print(f"ok: {len(families)} families, {len(all_samples)} samples, "
          f"requests_total{{code=\"OK\"}} = {value(all_samples, 'convoy_requests_total', **ok):g}")


def check_histogram(name, samples):
    buckets = defaultdict(list)
    sums, counts = {}, {}
    for s in samples:
        key = tuple(sorted((k, v) for k, v in s.labels.items() if k != "le"))
        if s.name == name + "_bucket":
            buckets[key].append((float(s.labels["le"]), s.value))
        elif s.name == name + "_sum":
            sums[key] = s.value
        elif s.name == name + "_count":
            counts[key] = s.value
        else:
            raise CheckFailed(f"{s.name} in histogram {name}")
    check(buckets, f"{name}: no buckets")
    check(set(buckets) == set(sums) == set(counts), f"{name}: label sets of parts differ")
    for key, bs in buckets.items():
        les = [le for le, _ in bs]
        check(les == sorted(les) and len(set(les)) == len(les), f"{name}{key}: le order")
        check(les[-1] == math.inf, f"{name}{key}: no le=\"+Inf\" bucket")
        cs = [c for _, c in bs]
        check(all(a <= b for a, b in zip(cs, cs[1:])), f"{name}{key}: not cumulative")
        check(cs[-1] == counts[key], f"{name}{key}: +Inf {cs[-1]} != _count {counts[key]}")
        check(math.isfinite(sums[key]) and sums[key] >= 0, f"{name}{key}: _sum {sums[key]}")


if __name__ == "__main__":
    try:
        main()
    except CheckFailed as e:
        print(f"check_exposition.py: FAILED: {e}", file=sys.stderr)
        sys.exit(1)
