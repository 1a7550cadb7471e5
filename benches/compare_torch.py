#!/usr/bin/env python3
"""Side-by-side speed of convoy and PyTorch on the reference networks, as one run.

1. ../shared/bench/torch_baseline.py (PyTorch, CPU) times lenet-28, resnet20-32 and mbv2-224 at
   batch 1 and 32 with 1 and 2 threads, and exports the very same weights as ONNX (--export).
2. `convoy import` turns each export into a bundle; `convoy bench --local` times the engine on
   it at the same batch sizes and thread counts, and reports load time (read, verify, plan).
3. Peak resident memory for mbv2-224 at batch 32: `convoy bench --local --batches 32` (its own
   process) against benches/torch_memory.py (PyTorch in its own process).
4. The machine's single-precision FMA peak and the ResNet-20 3×3 convolutions at batch 32, from
   `cargo bench --bench kernels` (criterion ids in benches/kernels.rs's header), one thread.

Prints markdown tables: images/s and ratios, memory, load time, fraction of peak.
Needs the PyTorch venv (see ../shared/bench/README.md); not part of CI.

Usage: benches/compare_torch.py [--python .venv-ref/bin/python] [--duration S] [--skip-kernels]
Ratios, not absolute figures, are what to compare: machines here are shared and noisy.
"""
import argparse, json, os, platform, subprocess, sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NETS = ("lenet-28", "resnet20-32", "mbv2-224")
CONVOY = os.path.join(ROOT, "target", "release", "convoy")


def run(cmd, **kw):
    return subprocess.run(cmd, cwd=ROOT, check=True, capture_output=True, text=True, **kw).stdout


def torch_rows(python, threads, export):
    script = os.path.join(ROOT, "..", "shared", "bench", "torch_baseline.py")
    cmd = [python, script, "--threads", str(threads), "--json"]
    if export:
        cmd += ["--export", export]
    return {(r["net"], r["batch"]): r["images_per_s"] for r in json.loads(run(cmd))}


def convoy_local(bundle, threads, batches, seconds):
    out = run([CONVOY, "bench", "--local", bundle, "--threads", str(threads),
               "--batches", ",".join(map(str, batches)), "--duration", str(seconds), "--json"])
    return json.loads(out)


def criterion_median_ns(*parts):
    path = os.path.join(ROOT, "target", "criterion", *parts, "new", "estimates.json")
    with open(path) as f:
        return json.load(f)["median"]["point_estimate"]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--python", default=os.path.join(ROOT, ".venv-ref", "bin", "python"))
    ap.add_argument("--onnx", default=os.path.join(ROOT, "target", "ref-onnx"))
    ap.add_argument("--duration", type=float, default=3.0, help="seconds per convoy batch size")
    ap.add_argument("--skip-kernels", action="store_true", help="reuse the last kernel results")
    a = ap.parse_args()

    run(["cargo", "build", "--release", "--quiet"])
    torch = {1: torch_rows(a.python, 1, a.onnx), 2: torch_rows(a.python, 2, None)}
    bundles = {}
    os.makedirs(os.path.join(ROOT, "target", "ref-bundles"), exist_ok=True)
    for net in NETS:
        bundles[net] = os.path.join(ROOT, "target", "ref-bundles", net + ".cvb")
        run([CONVOY, "import", os.path.join(a.onnx, net + ".onnx"), "-o", bundles[net],
             "--name", net])
    convoy = {}
    load_ms = {}
    for net in NETS:
        for threads in (1, 2):
            r = convoy_local(bundles[net], threads, (1, 32), a.duration)
            for row in r["results"]:
                convoy[(net, row["batch"], threads)] = row["images_per_s"]
            load_ms.setdefault(net, []).append(r["load_ms"])
    # Peak memory, each side in a process of its own, batch 32, 2 threads.
    convoy_rss = convoy_local(bundles["mbv2-224"], 2, (32,), a.duration)["peak_rss_mb"]
    torch_rss = json.loads(run([a.python, os.path.join(ROOT, "benches", "torch_memory.py"),
                                "--json"]))

    versions = run([a.python, "-c", "import torch; print(torch.__version__)"]).strip()
    commit = run(["git", "rev-parse", "--short", "HEAD"]).strip()
    cpu = next((l.split(":", 1)[1].strip() for l in open("/proc/cpuinfo")
                if l.startswith("model name")), platform.processor())
    isa = convoy_local(bundles["lenet-28"], 1, (1,), 0.2)["isa"]
    print(f"{cpu}, {os.cpu_count()} cores; PyTorch {versions}; convoy {commit} ({isa})\n")
    print("| net | batch | threads | PyTorch images/s | convoy images/s | convoy / PyTorch |")
    print("|---|---|---|---|---|---|")
    for net in NETS:
        for batch in (1, 32):
            for threads in (1, 2):
                t = torch[threads][(net, batch)]
                c = convoy[(net, batch, threads)]
                print(f"| {net} | {batch} | {threads} | {t:,.0f} | {c:,.0f} | {c / t:.2f} |")
    print()
    print("| mbv2-224, batch 32, 2 threads | peak resident memory |")
    print("|---|---|")
    print(f"| PyTorch | {torch_rss['peak_rss_mb']:,.0f} MiB |")
    print(f"| convoy | {convoy_rss:,.0f} MiB |")
    print()
    print("| net | convoy load: read, verify, plan (ms, best of 2) |")
    print("|---|---|")
    for net in NETS:
        print(f"| {net} | {min(load_ms[net]):.1f} |")

    if not a.skip_kernels:
        subprocess.run(["cargo", "bench", "--bench", "kernels", "--",
                        "fma_peak|resnet20_conv3x3_b32"], cwd=ROOT, check=True,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    kernels = os.path.join(ROOT, "target", "criterion")
    peak_dir = os.path.join(kernels, "fma_peak")
    conv_dir = os.path.join(kernels, "resnet20_conv3x3_b32")
    if os.path.isdir(peak_dir) and os.path.isdir(conv_dir):
        print()
        print(kernel_table(peak_dir, conv_dir))
    return 0


def throughput_elements(bench_dir):
    with open(os.path.join(bench_dir, "new", "benchmark.json")) as f:
        t = json.load(f).get("throughput") or {}
    return t.get("Elements") or t.get("Bytes")


# How many of each 3×3 shape ResNet-20 has (benches/kernels.rs, RESNET20_3X3): the aggregate
# weights each shape's FLOPs and time by it.
RESNET20_COUNTS = {
    "stem_3to16_32x32": 1,
    "stage1_16to16_32x32": 6,
    "stage2_first_16to32_32x32_s2": 1,
    "stage2_32to32_16x16": 5,
    "stage3_first_32to64_16x16_s2": 1,
    "stage3_64to64_8x8": 5,
}


def kernel_table(peak_dir, conv_dir):
    """GFLOP/s of each 3×3 shape against the peak (criterion throughput = FLOPs per iteration),
    medians against the peak's median, and the network-weighted aggregate per instruction set.
    The scalar path has no fraction: its peak is a chain of scalar FMAs, while the compiler
    vectorises the portable kernels, so the ratio would say nothing."""
    def flops_and_ns(path):
        ns = criterion_median_ns(*os.path.relpath(path, os.path.join(ROOT, "target", "criterion")).split(os.sep))
        return throughput_elements(path), ns

    peaks = {}
    for isa in sorted(os.listdir(peak_dir)):
        if os.path.isdir(os.path.join(peak_dir, isa, "new")):
            f, ns = flops_and_ns(os.path.join(peak_dir, isa))
            peaks[isa] = f / ns
    lines = ["| 3×3 convolution (ResNet-20, batch 32) | ISA | GFLOP/s | of FMA peak |",
             "|---|---|---|---|"]
    totals = {}
    for shape in sorted(os.listdir(conv_dir)):
        for isa in sorted(os.listdir(os.path.join(conv_dir, shape))):
            path = os.path.join(conv_dir, shape, isa)
            if isa in peaks and os.path.isdir(os.path.join(path, "new")):
                f, ns = flops_and_ns(path)
                g = f / ns
                share = "—" if isa == "scalar" else f"{100 * g / peaks[isa]:.0f} %"
                lines.append(f"| {shape} | {isa} | {g:.1f} | {share} |")
                n = RESNET20_COUNTS.get(shape)
                if n:
                    t = totals.setdefault(isa, [0.0, 0.0, 0])
                    t[0] += n * f
                    t[1] += n * ns
                    t[2] += 1
    for isa, (f, ns, shapes) in sorted(totals.items()):
        if shapes == len(RESNET20_COUNTS) and isa != "scalar":
            g = f / ns
            lines.append(f"| all 19 layers, FLOP-weighted | {isa} | {g:.1f} | {100 * g / peaks[isa]:.0f} % |")
    lines.append("")
    lines.append("| FMA peak, one core | " + ", ".join(f"{i}: {g:.1f} GFLOP/s" for i, g in peaks.items()) + " |")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(main())
