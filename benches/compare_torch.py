#!/usr/bin/env python3
"""Side-by-side speed of convoy and PyTorch on the reference networks, as one run.

Runs ../shared/bench/torch_baseline.py (PyTorch, CPU) at 1 and 2 threads, then
`cargo bench --bench networks`, and prints images/s for both and their ratio.
Needs the PyTorch venv (see ../shared/bench/README.md); not part of CI.

Usage: benches/compare_torch.py [--python .venv-ref/bin/python] [--skip-bench]
Ratios, not absolute figures, are what to compare: machines here are shared and noisy.
Note: convoy's networks carry random weights built in benches/nets/; speed does not depend
on weight values, only on shapes, which match the PyTorch script's networks.
"""
import argparse, json, os, subprocess, sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def torch_rows(python, threads):
    script = os.path.join(ROOT, "..", "shared", "bench", "torch_baseline.py")
    out = subprocess.run([python, script, "--threads", str(threads), "--json"],
                         check=True, capture_output=True, text=True).stdout
    return {(r["net"], r["batch"]): r["images_per_s"] for r in json.loads(out)}


def convoy_rate(net, threads, batch):
    path = os.path.join(ROOT, "target", "criterion", net, f"threads{threads}", f"batch{batch}",
                        "new", "estimates.json")
    with open(path) as f:
        est = json.load(f)
    seconds = est["median"]["point_estimate"] * 1e-9
    return batch / seconds


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--python", default=os.path.join(ROOT, ".venv-ref", "bin", "python"))
    ap.add_argument("--skip-bench", action="store_true", help="reuse the last criterion results")
    a = ap.parse_args()
    torch = {t: torch_rows(a.python, t) for t in (1, 2)}
    version = subprocess.run([a.python, "-c", "import torch; print(torch.__version__)"],
                             capture_output=True, text=True).stdout.strip()
    if not a.skip_bench:
        subprocess.run(["cargo", "bench", "--bench", "networks"], cwd=ROOT, check=True,
                       stdout=subprocess.DEVNULL)
    print(f"PyTorch {version}; convoy {subprocess.run(['git', 'rev-parse', '--short', 'HEAD'], cwd=ROOT, capture_output=True, text=True).stdout.strip()}")
    print(f"| net | batch | threads | PyTorch images/s | convoy images/s | convoy / PyTorch |")
    print(f"|---|---|---|---|---|---|")
    for net in ("lenet-28", "resnet20-32", "mbv2-224"):
        for batch in (1, 32):
            for threads in (1, 2):
                t = torch[threads][(net, batch)]
                c = convoy_rate(net, threads, batch)
                print(f"| {net} | {batch} | {threads} | {t:,.0f} | {c:,.0f} | {c / t:.2f} |")


if __name__ == "__main__":
    sys.exit(main())
