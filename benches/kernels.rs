//! Kernel throughput over shapes named by the networks they come from.
//!
//! Throughput is reported in elements per second where one "element" is one floating-point
//! operation (a multiply-add counts 2), so criterion's `Gelem/s` reads as GFLOP/s. Every
//! instruction set this CPU supports is measured, or only the one `CONVOY_ISA` forces.
//!
//! Run: `cargo bench --bench kernels` (add a filter such as `-- avx512` to narrow it).

use std::hint::black_box;
use std::time::Duration;

use convoy::engine::kernels::activation::Activation;
use convoy::engine::kernels::depthwise::{PackedDepthwise, depthwise};
use convoy::engine::kernels::gemm::{
    BSource, ConvGeom, Epilogue, GemmScratch, PackedWeights, gemm,
};
use convoy::engine::kernels::isa::{ISA_VARIABLE, Isa};
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

criterion_group! {
    name = benches;
    config = Criterion::default()
        .sample_size(20)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    targets = bench_gemm, bench_depthwise
}
criterion_main!(benches);
