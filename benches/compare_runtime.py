#!/usr/bin/env python3
"""Side-by-side speed of convoy and the general-purpose ONNX runtime library (PyPI `onnxruntime`,
CPU provider) on the same ONNX files, as one run. The library is a speed reference only.

1. `convoy import` turns each ONNX file into a bundle under target/runtime-cmp/; a refused
   import is reported as a row of its own.
2. For batch 1 and 32 on 1 and 2 threads, `convoy bench --local` times the engine, and the
   runtime library is timed in this process the way ../shared/bench/runtime_compare.py does it
   (random normal input, seed 0; intra-op threads = threads, inter-op threads = 1; warm-up, then
   the median of timed runs over --duration seconds). PyTorch eager is timed too on the nets
   ../shared/bench/torch_baseline.py defines (lenet-28, resnet20-32, mbv2-224), with its
   `time_batches`; the ratio column divides by the faster of the two references, as the shared
   measure does. This is done --rounds times, convoy and the references interleaved per net and
   thread count; each cell reports the median over the rounds.
3. From convoy's runs: batch-1 thread scaling (also for the library), the fraction of the
   measured one-core FMA peak at batch 32 on one thread, and load time (best over the runs).
4. Peak resident memory at batch 32 on 2 threads for mbv2-224 and resnet18-224, each side in a
   process of its own: `convoy bench --local --batches 32` and this script re-invoked with
   --rss-of-runtime.

Prints markdown tables, and last `worst convoy / faster reference: R (net, batch, threads)`.
Does not build: run `cargo build --release` first. Needs the venv of ../shared/bench/README.md
(onnx, onnxruntime, numpy, torch); not part of CI.

Usage: .venv-ref/bin/python benches/compare_runtime.py [--duration S] [--rounds R]
                                                       [--onnx FILE.onnx ...] [--skip-memory]
Ratios, not absolute figures, are what to compare: machines here are shared and noisy.
"""
import argparse, datetime, glob, json, os, platform, resource, statistics, subprocess, sys, time
import numpy as np, onnxruntime as ort

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SHARED_BENCH = os.path.join(ROOT, "..", "shared", "bench")
CONVOY = os.path.join(ROOT, "target", "release", "convoy")
BUNDLES = os.path.join(ROOT, "target", "runtime-cmp")
NET_DIRS = (os.path.join(ROOT, "target", "ref-onnx"), os.path.join(ROOT, "target", "speed-nets"))
CELLS = [(batch, threads) for batch in (1, 32) for threads in (1, 2)]
MEMORY_NETS = ("mbv2-224", "resnet18-224")


def run(cmd):
    return subprocess.run(cmd, cwd=ROOT, check=True, capture_output=True, text=True).stdout


def input_shape(path):
    """Dims after the batch dim of the graph's first input (onnx imported here, so that the
    --rss-of-runtime process does not carry it)."""
    import onnx
    dims = onnx.load(path, load_external_data=False).graph.input[0].type.tensor_type.shape.dim
    return tuple(d.dim_value for d in dims[1:])


def random_batch(shape, batch):
    return np.random.default_rng(0).standard_normal((batch, *shape)).astype(np.float32)


def runtime_session(path, threads):
    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    return ort.InferenceSession(path, options, providers=["CPUExecutionProvider"])


def runtime_images_per_s(path, x, threads, budget):
    """Three warm-up runs, then the median of timed runs over `budget` seconds (at least 5)."""
    session = runtime_session(path, threads)
    feed = {session.get_inputs()[0].name: x}
    for _ in range(3):
        session.run(None, feed)
    times = []
    while sum(times) < budget or len(times) < 5:
        start = time.perf_counter()
        session.run(None, feed)
        times.append(time.perf_counter() - start)
    return len(x) / statistics.median(times)


def torch_images_per_s(name, batch, threads, budget):
    """PyTorch eager on the shared baseline's definition of `name` (None where it has none, or
    without torch): fixed seed, random input, the baseline's own timing loop."""
    sys.path.insert(0, SHARED_BENCH)
    try:
        import torch, torch_baseline as tb
    except ImportError:
        return None
    finally:
        sys.path.remove(SHARED_BENCH)
    if name not in tb.NETS:
        return None
    torch.set_num_threads(threads)
    torch.manual_seed(7)
    ctor, shape = tb.NETS[name]
    model = ctor().eval()
    return batch / tb.time_batches(model, torch.randn(batch, *shape), budget_s=budget)


def print_runtime_rss(path, batch, threads):
    """The --rss-of-runtime mode: run one batch a few times, print this process's peak RSS (MiB)."""
    session = runtime_session(path, int(threads))
    first = session.get_inputs()[0]
    feed = {first.name: random_batch(first.shape[1:], int(batch))}
    for _ in range(3):
        session.run(None, feed)
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)


def convoy_local(bundle, threads, batches, seconds):
    return json.loads(run([CONVOY, "bench", "--local", bundle, "--threads", str(threads),
                           "--batches", ",".join(map(str, batches)), "--duration", str(seconds),
                           "--json"]))


def import_nets(paths):
    """One dict per ONNX file: name, path, bundle, input shape, and `refused`: None, or the first
    clause of convoy's last message line when import refused."""
    os.makedirs(BUNDLES, exist_ok=True)
    nets = []
    for path in paths:
        name = os.path.splitext(os.path.basename(path))[0].replace(".", "-")
        bundle = os.path.join(BUNDLES, name + ".cvb")
        done = subprocess.run([CONVOY, "import", path, "-o", bundle, "--name", name], cwd=ROOT,
                              capture_output=True, text=True)
        last_line = (done.stderr.strip().splitlines() or ["no message"])[-1]
        reason = last_line.split("; ")[0] if done.returncode else None
        nets.append(dict(name=name, path=path, bundle=bundle, shape=input_shape(path),
                         refused=reason))
    return nets


def measure(nets, rounds, duration):
    """Per (net, batch, threads), lists over the rounds: convoy's result rows (with the run's
    load_ms, fma_peak_gflops and isa added), the runtime library's images/s, and PyTorch's
    (nets of the shared baseline only)."""
    convoy, runtime, torch_ips = {}, {}, {}
    for round_no in range(1, rounds + 1):
        for net in (n for n in nets if not n["refused"]):
            print(f"round {round_no}/{rounds}: {net['name']}", file=sys.stderr)
            for threads in (1, 2):
                report = convoy_local(net["bundle"], threads, (1, 32), duration)
                extra = {k: report[k] for k in ("load_ms", "fma_peak_gflops", "isa")}
                for row in report["results"]:
                    key = (net["name"], row["batch"], threads)
                    convoy.setdefault(key, []).append(dict(row, **extra))
                for batch in (1, 32):
                    x = random_batch(net["shape"], batch)
                    runtime.setdefault((net["name"], batch, threads), []).append(
                        runtime_images_per_s(net["path"], x, threads, duration))
                    eager = torch_images_per_s(net["name"], batch, threads, duration)
                    if eager is not None:
                        torch_ips.setdefault((net["name"], batch, threads), []).append(eager)
    return convoy, runtime, torch_ips


def median_field(rows, field):
    return statistics.median(r[field] for r in rows)


def speed_table(nets, convoy, runtime, torch_ips):
    """Median images/s per cell, and the worst ratio to the faster reference as (ratio, 'net,
    batch, threads')."""
    print("| net | batch, threads | convoy | runtime lib | PyTorch | "
          "convoy / faster reference |")
    print("|---|---|---|---|---|---|")
    worst = None
    for net in nets:
        name = net["name"]
        if net["refused"]:
            print(f"| {name} | import refused: {net['refused']} | | | | |")
            continue
        for batch, threads in CELLS:
            key = (name, batch, threads)
            ours = median_field(convoy[key], "images_per_s")
            theirs = statistics.median(runtime[key])
            eager = statistics.median(torch_ips[key]) if key in torch_ips else None
            ratio = ours / max(theirs, eager or 0)
            eager_cell = f"{eager:,.0f}" if eager is not None else "—"
            print(f"| {name} | {batch}, {threads} | {ours:,.0f} | {theirs:,.0f} | {eager_cell} | "
                  f"{ratio:.2f} |")
            if worst is None or ratio < worst[0]:
                worst = (ratio, f"{name}, batch {batch}, {threads} thread{'s' * (threads > 1)}")
    return worst


def second_core_share(nets, duration):
    """What a second core adds on this machine, measured: two single-thread `convoy bench
    --local` processes at once against one alone (images/s of both / of one), on the first
    measured net. 2.0 on two free cores; less when other tenants share the second one, which
    caps every two-thread figure."""
    net = next((n for n in nets if not n["refused"]), None)
    if net is None:
        return None
    cmd = [CONVOY, "bench", "--local", net["bundle"], "--threads", "1", "--batches", "1",
           "--duration", str(duration), "--json"]
    alone = json.loads(run(cmd))["best_images_per_s"]
    pair = [subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, text=True) for _ in range(2)]
    both = sum(json.loads(p.communicate()[0])["best_images_per_s"] for p in pair)
    return both / alone, net["name"]


def scaling_table(names, convoy, runtime, ceiling):
    if ceiling:
        print(f"The machine's ceiling: two single-thread convoy processes at once ran "
              f"{ceiling[0]:.2f}x one alone ({ceiling[1]}, batch 1).\n")
    print("| net | convoy: batch 1, 2 threads / 1 thread | runtime lib: the same |")
    print("|---|---|---|")
    for name in names:
        ours = [median_field(convoy[(name, 1, t)], "images_per_s") for t in (1, 2)]
        theirs = [statistics.median(runtime[(name, 1, t)]) for t in (1, 2)]
        print(f"| {name} | {ours[1] / ours[0]:.2f} | {theirs[1] / theirs[0]:.2f} |")


def peak_and_load_tables(names, convoy):
    print("| net, batch 32, 1 thread | convoy of FMA peak | GFLOP/s | one-core peak, GFLOP/s |")
    print("|---|---|---|---|")
    for name in names:
        rows = convoy[(name, 32, 1)]
        print(f"| {name} | {100 * median_field(rows, 'of_fma_peak'):.0f} % | "
              f"{median_field(rows, 'gflops'):.1f} | {median_field(rows, 'fma_peak_gflops'):.1f} |")
    print()
    print("| net | convoy load: read, verify, plan (ms, best over the runs) |")
    print("|---|---|")
    for name in names:
        best = min(r["load_ms"] for cell in CELLS for r in convoy[(name, *cell)])
        print(f"| {name} | {best:.1f} |")


def memory_table(nets):
    """Peak RSS at batch 32 on 2 threads, each side in a process of its own."""
    chosen = [n for n in nets if n["name"] in MEMORY_NETS and not n["refused"]]
    if not chosen:
        return
    print("| net, batch 32, 2 threads | convoy peak RSS | runtime lib peak RSS |")
    print("|---|---|---|")
    for net in chosen:
        ours = convoy_local(net["bundle"], 2, (32,), 2)["peak_rss_mb"]
        theirs = float(run([sys.executable, os.path.abspath(__file__), "--rss-of-runtime",
                            net["path"], "32", "2"]))
        print(f"| {net['name']} | {ours:,.0f} MiB | {theirs:,.0f} MiB |")
    print()


def header(convoy):
    cpu = next((l.split(":", 1)[1].strip() for l in open("/proc/cpuinfo")
                if l.startswith("model name")), platform.processor())
    commit = run(["git", "rev-parse", "--short", "HEAD"]).strip()
    isa = next(iter(convoy.values()))[0]["isa"] if convoy else "no run"
    date = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return (f"{cpu}, {os.cpu_count()} cores; onnxruntime {ort.__version__}; "
            f"convoy {commit} ({isa}); {date}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--onnx", nargs="+", help="ONNX files (default: all in target/ref-onnx "
                    "and target/speed-nets)")
    ap.add_argument("--duration", type=float, default=2.0,
                    help="seconds per convoy batch size, and the runtime library's budget per cell")
    ap.add_argument("--rounds", type=int, default=3, help="rounds; each cell reports the median")
    ap.add_argument("--skip-memory", action="store_true", help="leave out the peak-memory table")
    ap.add_argument("--rss-of-runtime", nargs=3, metavar=("FILE", "BATCH", "THREADS"),
                    help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.rss_of_runtime:
        print_runtime_rss(*a.rss_of_runtime)
        return 0

    paths = [os.path.abspath(p) for p in a.onnx] if a.onnx else \
        sorted(p for d in NET_DIRS for p in glob.glob(os.path.join(d, "*.onnx")))
    nets = import_nets(paths)
    convoy, runtime, torch_ips = measure(nets, a.rounds, a.duration)
    measured = [n["name"] for n in nets if not n["refused"]]
    ceiling = second_core_share(nets, a.duration)

    print(header(convoy) + f"; medians of {a.rounds} round(s), {a.duration:g} s per measure\n")
    worst = speed_table(nets, convoy, runtime, torch_ips)
    print()
    if measured:
        scaling_table(measured, convoy, runtime, ceiling)
        print()
        peak_and_load_tables(measured, convoy)
        print()
    if not a.skip_memory:
        memory_table(nets)
    if worst:
        print(f"worst convoy / faster reference: {worst[0]:.2f} ({worst[1]})")
    else:
        print("worst convoy / faster reference: none measured")
    return 0


if __name__ == "__main__":
    sys.exit(main())
