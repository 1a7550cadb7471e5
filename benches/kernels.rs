//! Kernel throughput over shapes named by the networks they come from.
//!
//! Throughput is reported in elements per second where one "element" is one floating-point
//! operation (a multiply-add counts 2), so criterion's `Gelem/s` reads as GFLOP/s. Every
//! instruction set this CPU supports is measured, or only the one `CONVOY_ISA` forces.
//!
//! Run: `cargo bench --bench kernels` (add a filter such as `-- avx512` to narrow it).
//!
//! Groups and ids (stable: scripts read `target/criterion/<group>/<id>/new/estimates.json`):
//! - `gemm/<case>/<isa>`, `depthwise/<case>/<isa>`: single calls over shapes of several
//!   networks.
//! - `fma_peak/<isa>`: one batch of the register-resident multiply-add loop of
//!   `kernels::peak` (throughput = its FLOPs): the machine's single-core peak, measured in the
//!   same run as the convolutions it is compared with.
//! - `resnet20_conv3x3_b32/<layer>/<isa>`: every distinct 3x3 convolution of ResNet-20 at
//!   32x32 input (He et al., "Deep Residual Learning for Image Recognition", CVPR 2016, §4.2:
//!   a 3x3 stem to 16 channels, then stages of 16, 32 and 64 channels at 32x32, 16x16 and 8x8,
//!   the first 3x3 of stages 2 and 3 with stride 2), run for a batch of 32 exactly as the
//!   executor runs a convolution (one GEMM call per sample over the implicit im2col of its
//!   input, bias and ReLU fused). `<isa>` takes the default im2col route; `<isa>_packed`
//!   forces the packed route, for comparison in the same run. Throughput is the convolution's
//!   FLOPs (2 per multiply-add, padding taps included as the GEMM computes them).
//!
//! Before the criterion groups, a short summary is printed to stderr: the measured peak and,
//! per ResNet-20 layer and instruction set, GFLOP/s and the fraction of that peak (fastest of
//! a few repetitions, like the peak's fastest slice; criterion's estimates are the record),
//! then the network's aggregate: all its 3x3 convolutions' FLOPs (stem, 6 at stage 1, the
//! strided first of stage 2 and 5 more, the same at stage 3) over their summed times. After
//! the ResNet-20 group the same figures are printed from criterion's median per layer (the
//! record), against criterion's median of `fma_peak/<isa>` when the filter let it run in the
//! same process (include `fma_peak` in the filter for medians against medians).

use std::hint::black_box;
use std::time::Duration;

use convoy::engine::kernels::activation::Activation;
use convoy::engine::kernels::depthwise::{PackedDepthwise, depthwise};
use convoy::engine::kernels::gemm::{
    BSource, ConvGeom, Epilogue, GemmScratch, Im2colAlgo, PackedWeights, gemm,
};
use convoy::engine::kernels::isa::{ISA_VARIABLE, Isa};
use convoy::engine::kernels::peak::{fma_batch, fma_peak};
use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};

fn isas() -> Vec<Isa> {
    match std::env::var(ISA_VARIABLE) {
        Ok(v) if !v.trim().is_empty() => vec![Isa::detect().expect("CONVOY_ISA is usable here")],
        _ => Isa::supported(),
    }
}

/// Deterministic data in [-1, 1) (values do not affect speed; determinism keeps runs alike).
fn data(n: usize, seed: u32) -> Vec<f32> {
    (0..n)
        .map(|i| {
            let x = (i as u32)
                .wrapping_mul(2_654_435_761)
                .wrapping_add(seed.wrapping_mul(40_503));
            (x >> 8) as f32 / (1u32 << 23) as f32 - 1.0
        })
        .collect()
}

/// Square convolution geometry, "same" padding for odd kernels.
fn conv(c: usize, hw: usize, k: usize, stride: usize) -> ConvGeom {
    let pad = k / 2;
    let out = (hw + 2 * pad - k) / stride + 1;
    ConvGeom {
        in_c: c,
        in_h: hw,
        in_w: hw,
        kh: k,
        kw: k,
        stride_h: stride,
        stride_w: stride,
        dil_h: 1,
        dil_w: 1,
        pad_top: pad,
        pad_left: pad,
        out_h: out,
        out_w: out,
    }
}

enum Src {
    Im2col(ConvGeom),
    Matrix,
    MatrixT,
}

struct GemmCase {
    name: &'static str,
    m: usize,
    k: usize,
    n: usize,
    src: Src,
}

fn gemm_cases() -> Vec<GemmCase> {
    let im2col = |name, m, g: ConvGeom| GemmCase {
        name,
        m,
        k: g.in_c * g.kh * g.kw,
        n: g.out_h * g.out_w,
        src: Src::Im2col(g),
    };
    let mat = |name, m, k, n, src| GemmCase { name, m, k, n, src };
    vec![
        im2col("lenet conv2 5x5 M=16 K=150 N=100", 16, {
            let mut g = conv(6, 14, 5, 1);
            g.pad_top = 0;
            g.pad_left = 0;
            g.out_h = 10;
            g.out_w = 10;
            g
        }),
        im2col(
            "resnet20 3x3 stage1 M=16 K=144 N=1024",
            16,
            conv(16, 32, 3, 1),
        ),
        im2col(
            "resnet20 3x3 stage2 M=32 K=288 N=256",
            32,
            conv(32, 16, 3, 1),
        ),
        im2col("resnet20 3x3 stage3 M=64 K=576 N=64", 64, conv(64, 8, 3, 1)),
        im2col("mbv2 stem 3x3 s2 M=32 K=27 N=12544", 32, conv(3, 224, 3, 2)),
        mat(
            "mbv2 1x1 expand M=96 K=16 N=12544",
            96,
            16,
            12544,
            Src::Matrix,
        ),
        mat(
            "mbv2 1x1 project M=24 K=144 N=3136",
            24,
            144,
            3136,
            Src::Matrix,
        ),
        mat(
            "mbv2 1x1 expand M=576 K=96 N=196",
            576,
            96,
            196,
            Src::Matrix,
        ),
        mat(
            "mbv2 1x1 last M=1280 K=320 N=49",
            1280,
            320,
            49,
            Src::Matrix,
        ),
        mat("square M=512 K=512 N=512", 512, 512, 512, Src::Matrix),
        im2col("resnet18 3x3 M=128 K=1152 N=784", 128, conv(128, 28, 3, 1)),
        im2col("resnet18 3x3 M=256 K=2304 N=196", 256, conv(256, 14, 3, 1)),
        mat("dense head N=1 M=1000 K=1280", 1000, 1280, 1, Src::MatrixT),
        mat(
            "dense head N=32 M=1000 K=1280",
            1000,
            1280,
            32,
            Src::MatrixT,
        ),
        mat("dense lenet N=1 M=120 K=400", 120, 400, 1, Src::MatrixT),
    ]
}

fn bench_gemm(c: &mut Criterion) {
    let mut group = c.benchmark_group("gemm");
    for case in gemm_cases() {
        let a = data(case.m * case.k, 1);
        let b_data = match &case.src {
            Src::Im2col(g) => data(g.in_c * g.in_h * g.in_w, 2),
            Src::Matrix | Src::MatrixT => data(case.k * case.n, 2),
        };
        let b = match &case.src {
            Src::Im2col(g) => BSource::Im2col {
                input: &b_data,
                geom: *g,
                c0: 0,
            },
            Src::Matrix => BSource::Matrix {
                data: &b_data,
                ld: case.n,
            },
            Src::MatrixT => BSource::MatrixT {
                data: &b_data,
                ld: case.k,
            },
        };
        let bias = data(case.m, 3);
        let epi = Epilogue {
            bias: Some(&bias),
            residual: None,
            act: Activation::Relu,
        };
        group.throughput(Throughput::Elements((2 * case.m * case.k * case.n) as u64));
        for isa in isas() {
            let packed = PackedWeights::pack(isa, &a, case.m, case.k);
            let mut out = vec![0.0f32; case.m * case.n];
            let mut scratch = GemmScratch::new();
            group.bench_function(BenchmarkId::new(case.name, isa.name()), |bench| {
                bench.iter(|| {
                    gemm(
                        &packed,
                        &b,
                        case.n,
                        0..case.n,
                        &mut out,
                        case.n,
                        &epi,
                        &mut scratch,
                    );
                    black_box(&out);
                })
            });
        }
    }
    group.finish();
}

fn bench_depthwise(c: &mut Criterion) {
    let mut group = c.benchmark_group("depthwise");
    let cases = [
        ("mbv2 dw 3x3 s1 C=32 112x112", conv(32, 112, 3, 1)),
        ("mbv2 dw 3x3 s2 C=96 112x112", conv(96, 112, 3, 2)),
        ("mbv2 dw 3x3 s1 C=144 56x56", conv(144, 56, 3, 1)),
        ("mbv2 dw 3x3 s1 C=576 14x14", conv(576, 14, 3, 1)),
        ("mbv2 dw 3x3 s1 C=960 7x7", conv(960, 7, 3, 1)),
    ];
    for (name, g) in cases {
        let input = data(g.in_c * g.in_h * g.in_w, 4);
        let w = data(g.in_c * 9, 5);
        let bias = data(g.in_c, 6);
        let epi = Epilogue {
            bias: Some(&bias),
            residual: None,
            act: Activation::Clip { min: 0.0, max: 6.0 },
        };
        let outputs = g.in_c * g.out_h * g.out_w;
        group.throughput(Throughput::Elements((2 * 9 * outputs) as u64));
        for isa in isas() {
            let packed = PackedDepthwise::pack(isa, &w, g.in_c, 3, 3);
            let mut out = vec![0.0f32; outputs];
            group.bench_function(BenchmarkId::new(name, isa.name()), |bench| {
                bench.iter(|| {
                    depthwise(&packed, &g, &input, &mut out, 0..g.in_c, &epi);
                    black_box(&out);
                })
            });
        }
    }
    group.finish();
}

fn bench_fma_peak(c: &mut Criterion) {
    let mut group = c.benchmark_group("fma_peak");
    for isa in isas() {
        let (_, flops) = fma_batch(isa);
        group.throughput(Throughput::Elements(flops));
        let mut ran = false;
        group.bench_function(isa.name(), |bench| {
            ran = true;
            bench.iter(|| black_box(fma_batch(black_box(isa))))
        });
        if ran && let Ok(mut v) = PEAK_MEASURED.lock() {
            v.push(isa);
        }
    }
    group.finish();
}

/// Batch size of the ResNet-20 group.
const BATCH: usize = 32;

/// One 3x3 convolution of ResNet-20: id, input channels, output channels, input size, stride,
/// and how many times the network runs it.
struct Layer {
    id: &'static str,
    count: usize,
    in_c: usize,
    out_c: usize,
    hw: usize,
    stride: usize,
}

/// The distinct 3x3 convolutions of ResNet-20 on 32x32 images (He et al. 2016, §4.2: n = 3
/// blocks of two 3x3 convolutions per stage, the first of stages 2 and 3 strided).
const RESNET20_3X3: [Layer; 6] = [
    Layer {
        id: "stem_3to16_32x32",
        count: 1,
        in_c: 3,
        out_c: 16,
        hw: 32,
        stride: 1,
    },
    Layer {
        id: "stage1_16to16_32x32",
        count: 6,
        in_c: 16,
        out_c: 16,
        hw: 32,
        stride: 1,
    },
    Layer {
        id: "stage2_first_16to32_32x32_s2",
        count: 1,
        in_c: 16,
        out_c: 32,
        hw: 32,
        stride: 2,
    },
    Layer {
        id: "stage2_32to32_16x16",
        count: 5,
        in_c: 32,
        out_c: 32,
        hw: 16,
        stride: 1,
    },
    Layer {
        id: "stage3_first_32to64_16x16_s2",
        count: 1,
        in_c: 32,
        out_c: 64,
        hw: 16,
        stride: 2,
    },
    Layer {
        id: "stage3_64to64_8x8",
        count: 5,
        in_c: 64,
        out_c: 64,
        hw: 8,
        stride: 1,
    },
];

/// One layer's operands for a batch, and the executor's per-sample loop over them.
struct ConvBatch {
    g: ConvGeom,
    weights: PackedWeights,
    input: Vec<f32>,
    bias: Vec<f32>,
    out: Vec<f32>,
    scratch: GemmScratch,
}

impl ConvBatch {
    fn new(layer: &Layer, isa: Isa, algo: Im2colAlgo) -> ConvBatch {
        let g = conv(layer.in_c, layer.hw, 3, layer.stride);
        let k = layer.in_c * 9;
        ConvBatch {
            g,
            weights: PackedWeights::pack(isa, &data(layer.out_c * k, 7), layer.out_c, k),
            input: data(BATCH * layer.in_c * layer.hw * layer.hw, 8),
            bias: data(layer.out_c, 9),
            out: vec![0.0; BATCH * layer.out_c * g.out_h * g.out_w],
            scratch: GemmScratch::with_im2col(algo),
        }
    }

    fn flops(&self) -> u64 {
        let (m, k) = (self.weights.m(), self.weights.k());
        (2 * m * k * self.g.out_h * self.g.out_w * BATCH) as u64
    }

    /// As `run_conv` in the executor: one GEMM per sample, bias and ReLU fused.
    fn run(&mut self) {
        let n = self.g.out_h * self.g.out_w;
        let in_len = self.g.in_c * self.g.in_h * self.g.in_w;
        let out_len = self.weights.m() * n;
        let epi = Epilogue {
            bias: Some(&self.bias),
            residual: None,
            act: Activation::Relu,
        };
        for s in 0..BATCH {
            let b = BSource::Im2col {
                input: &self.input[s * in_len..][..in_len],
                geom: self.g,
                c0: 0,
            };
            gemm(
                &self.weights,
                &b,
                n,
                0..n,
                &mut self.out[s * out_len..][..out_len],
                n,
                &epi,
                &mut self.scratch,
            );
        }
        black_box(&self.out);
    }
}

/// Network-weighted throughput of the 3x3 convolutions: every layer's FLOPs times its count,
/// over its time per batch times its count (`secs` in the order of [`RESNET20_3X3`]).
fn aggregate_gflops(secs: &[f64]) -> f64 {
    let (mut flops, mut time) = (0.0, 0.0);
    for (layer, &t) in RESNET20_3X3.iter().zip(secs) {
        let g = conv(layer.in_c, layer.hw, 3, layer.stride);
        let f = (2 * layer.out_c * layer.in_c * 9 * g.out_h * g.out_w * BATCH) as f64;
        flops += f * layer.count as f64;
        time += t * layer.count as f64;
    }
    flops / time / 1e9
}

/// Prints the measured peak and each layer's fraction of it, then the network-weighted
/// aggregate (see the module documentation); returns the peak per instruction set.
fn print_peak_summary() -> Vec<(Isa, f64)> {
    let mut peaks = Vec::new();
    for isa in isas() {
        let peak = fma_peak(isa, Duration::from_millis(400));
        eprintln!(
            "fma_peak {isa}: {:.1} GFLOP/s (fastest slice; {:.1} average)",
            peak.gflops, peak.mean_gflops
        );
        for (algo, suffix) in [(Im2colAlgo::Auto, ""), (Im2colAlgo::Packed, "_packed")] {
            let mut secs = Vec::new();
            for layer in &RESNET20_3X3 {
                let mut conv = ConvBatch::new(layer, isa, algo);
                conv.run();
                let best = (0..5)
                    .map(|_| {
                        let t = std::time::Instant::now();
                        conv.run();
                        t.elapsed().as_secs_f64()
                    })
                    .fold(f64::INFINITY, f64::min);
                secs.push(best);
                let gflops = conv.flops() as f64 / best / 1e9;
                eprintln!(
                    "  {:<30} {:<14} {gflops:7.1} GFLOP/s  {:5.1} % of peak",
                    layer.id,
                    format!("{isa}{suffix}"),
                    100.0 * gflops / peak.gflops
                );
            }
            let agg = aggregate_gflops(&secs);
            eprintln!(
                "  {:<30} {:<14} {agg:7.1} GFLOP/s  {:5.1} % of peak",
                "resnet20 3x3 aggregate",
                format!("{isa}{suffix}"),
                100.0 * agg / peak.gflops
            );
        }
        peaks.push((isa, peak.gflops));
    }
    peaks
}

/// Criterion's median time per iteration of one benchmark (`<group>/<id>`), in seconds, from
/// the estimates it has just written (`target/criterion/<group>/<id>/new/estimates.json`);
/// `None` if absent. Medians, not means: on a shared machine other processes' bursts land in
/// a few samples, which drag the mean and hardly move the median.
fn criterion_median_secs(bench: &str) -> Option<f64> {
    let dir = std::env::var("CARGO_TARGET_DIR").unwrap_or_else(|_| "target".into());
    let path = format!("{dir}/criterion/{bench}/new/estimates.json");
    let text = std::fs::read_to_string(path).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    Some(v["median"]["point_estimate"].as_f64()? / 1e9)
}

/// Instruction sets whose `fma_peak` criterion benchmark ran in this process (its estimates
/// on disk are then this run's, not an earlier one's).
static PEAK_MEASURED: std::sync::Mutex<Vec<Isa>> = std::sync::Mutex::new(Vec::new());

/// The aggregate again, from criterion's per-layer medians (the record), for every route whose
/// layers were all measured in this run (`measured`: layer and id pairs), against criterion's
/// median of `fma_peak` when that ran too (medians against medians), else against the summary's
/// fastest-slice peak.
fn print_criterion_aggregate(peaks: &[(Isa, f64)], measured: &[(&str, String)]) {
    for &(isa, summary_peak) in peaks {
        let peak_ran = PEAK_MEASURED
            .lock()
            .map(|v| v.contains(&isa))
            .unwrap_or(false);
        let criterion_peak = peak_ran
            .then(|| criterion_median_secs(&format!("fma_peak/{isa}")))
            .flatten()
            .map(|t| fma_batch(isa).1 as f64 / t / 1e9);
        let (peak, which) = match criterion_peak {
            Some(p) => (p, "criterion median of fma_peak"),
            None => (summary_peak, "summary's fastest-slice peak"),
        };
        eprintln!("criterion medians against {which}: {peak:.1} GFLOP/s ({isa})");
        for suffix in ["", "_packed"] {
            let id = format!("{isa}{suffix}");
            let secs: Option<Vec<f64>> = RESNET20_3X3
                .iter()
                .map(|l| {
                    let ran = measured.iter().any(|(m, i)| *m == l.id && *i == id);
                    ran.then(|| {
                        criterion_median_secs(&format!("resnet20_conv3x3_b32/{}/{id}", l.id))
                    })
                    .flatten()
                })
                .collect();
            if let Some(secs) = secs {
                for (l, &t) in RESNET20_3X3.iter().zip(&secs) {
                    let g = conv(l.in_c, l.hw, 3, l.stride);
                    let f = (2 * l.out_c * l.in_c * 9 * g.out_h * g.out_w * BATCH) as f64;
                    eprintln!(
                        "criterion {:<30} {id:<14} {:7.1} GFLOP/s  {:5.1} % of peak",
                        l.id,
                        f / t / 1e9,
                        100.0 * f / t / 1e9 / peak
                    );
                }
                let agg = aggregate_gflops(&secs);
                eprintln!(
                    "criterion resnet20 3x3 aggregate {id:<14} {agg:7.1} GFLOP/s  {:5.1} % of peak",
                    100.0 * agg / peak
                );
            }
        }
    }
}

fn bench_resnet20(c: &mut Criterion) {
    let peaks = print_peak_summary();
    // (layer, id) pairs criterion measured in this run (not filtered out).
    let mut measured = Vec::new();
    let mut group = c.benchmark_group("resnet20_conv3x3_b32");
    for layer in &RESNET20_3X3 {
        for isa in isas() {
            for (algo, suffix) in [(Im2colAlgo::Auto, ""), (Im2colAlgo::Packed, "_packed")] {
                let mut conv = ConvBatch::new(layer, isa, algo);
                group.throughput(Throughput::Elements(conv.flops()));
                let id = BenchmarkId::new(layer.id, format!("{isa}{suffix}"));
                let mut ran = false;
                group.bench_function(id, |bench| {
                    ran = true;
                    bench.iter(|| conv.run())
                });
                if ran {
                    measured.push((layer.id, format!("{isa}{suffix}")));
                }
            }
        }
    }
    group.finish();
    print_criterion_aggregate(&peaks, &measured);
}

criterion_group! {
    name = benches;
    config = Criterion::default()
        .sample_size(20)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    targets = bench_gemm, bench_depthwise, bench_fma_peak, bench_resnet20
}
criterion_main!(benches);
