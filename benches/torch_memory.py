#!/usr/bin/env python3
"""Peak resident memory of PyTorch running one reference network, for comparison with convoy.

Usage (from the repository root, with the reference venv of ../shared/bench/README.md):

    .venv-ref/bin/python benches/torch_memory.py --net mbv2-224 --batch 32 --threads 2

The network comes from ../shared/bench/torch_baseline.py (its NETS table), so the weights and
architecture are the ones `torch_baseline.py --export` writes as ONNX. The model runs in
eval() under inference_mode, `--runs` times on one random batch; the script then prints the
process's peak resident set size (getrusage ru_maxrss, in MiB) at three points:
after `import torch`, after building the model, and after running it. The convoy side is
measured on the imported bundle with `convoy bench --local BUNDLE --batches 32 --threads 2`
(it reports its own peak) or `/usr/bin/time -v convoy run ...` ("Maximum resident set size"),
which likewise count the whole process: program, weights, activations.
"""
import argparse
import json
import os
import resource
import sys


def peak_mb():
    """Peak resident set size so far, MiB. ru_maxrss is in kilobytes on Linux (getrusage(2)),
    in bytes on macOS."""
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return kb / 1024 if sys.platform != "darwin" else kb / (1024 * 1024)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--net", default="mbv2-224")
    ap.add_argument("--batch", type=int, default=32)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument(
        "--baseline-dir",
        default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "shared", "bench"),
        help="folder holding torch_baseline.py",
    )
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()

    import torch

    after_import = peak_mb()
    sys.path.insert(0, os.path.abspath(a.baseline_dir))
    import torch_baseline  # noqa: E402  (found through --baseline-dir)

    torch.set_num_threads(a.threads)
    ctor, shape = torch_baseline.NETS[a.net]
    torch.manual_seed(7)  # the seed torch_baseline.py uses before building each network
    model = ctor().eval()
    after_build = peak_mb()
    x = torch.randn(a.batch, *shape)
    with torch.inference_mode():
        for _ in range(a.runs):
            y = model(x)
    after_run = peak_mb()
    row = {
        "net": a.net,
        "batch": a.batch,
        "threads": a.threads,
        "torch": torch.__version__,
        # MiB, as convoy's `bench --local` reports its own peak.
        "peak_rss_mb": round(after_run, 1),
        "peak_rss_mb_after_import": round(after_import, 1),
        "peak_rss_mb_after_build": round(after_build, 1),
        "output_shape": list(y.shape),
    }
    if a.json:
        print(json.dumps(row))
    else:
        print(
            f"{a.net} batch {a.batch} threads {a.threads} (torch {torch.__version__}): peak RSS "
            f"{after_import:.1f} MiB after import, {after_build:.1f} MiB after build, "
            f"{after_run:.1f} MiB after {a.runs} runs"
        )


if __name__ == "__main__":
    main()
