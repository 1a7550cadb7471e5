//! The three reference networks of `shared/bench/torch_baseline.py`, built as bundles with
//! random weights, for benchmarks and for the parameter-count checks in `tests/`.
//!
//! Architectures follow that script: a LeNet-style net on 1×28×28, ResNet-20 for 3×32×32 with
//! 1×1 projection shortcuts (He et al. 2016), and MobileNetV2 at width 1.0 on 3×224×224
//! (Sandler et al. 2018, table 2, as torchvision builds it).

#![allow(dead_code)]

use convoy::bundle::BundleWriter;
use convoy::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
use convoy::graph::Op;
use convoy::graph::build::GraphBuilder;

pub use convoy::graph::build::SplitMix64 as Rng;

/// Builds layers with random weights scaled so activations stay near unit size.
pub struct Net {
    pub b: GraphBuilder,
    pub rng: Rng,
    pub shape: Vec<usize>,
}

impl Net {
    pub fn new(shape: &[usize], seed: u64) -> Net {
        Net {
            b: GraphBuilder::new("input", shape),
            rng: Rng::new(seed),
            shape: shape.to_vec(),
        }
    }

    /// Convolution without bias, then batch norm with random statistics.
    #[allow(clippy::too_many_arguments)]
    pub fn conv_bn(
        &mut self,
        name: &str,
        x: &str,
        cin: usize,
        cout: usize,
        k: usize,
        stride: usize,
        groups: usize,
    ) -> String {
        let fan_in = (cin / groups) * k * k;
        let a = (3.0 / fan_in as f32).sqrt();
        let w = self.rng.vec(cout * fan_in, -a, a);
        let wn = self
            .b
            .tensor(&format!("{name}.weight"), &[cout, cin / groups, k, k], w);
        let p = k / 2;
        let conv = self.b.node(
            name,
            Op::Conv2d {
                weight: wn,
                bias: None,
                stride: [stride, stride],
                dilation: [1, 1],
                padding: [p, p, p, p],
                groups,
            },
            &[x],
        );
        let g = self.rng.vec(cout, 0.5, 1.5);
        let be = self.rng.vec(cout, -0.1, 0.1);
        let m = self.rng.vec(cout, -0.1, 0.1);
        let v = self.rng.vec(cout, 0.5, 1.5);
        let bn = format!("{name}.bn");
        let op = Op::BatchNorm {
            gamma: self.b.tensor(&format!("{bn}.gamma"), &[cout], g),
            beta: self.b.tensor(&format!("{bn}.beta"), &[cout], be),
            mean: self.b.tensor(&format!("{bn}.mean"), &[cout], m),
            variance: self.b.tensor(&format!("{bn}.variance"), &[cout], v),
            epsilon: 1e-5,
        };
        self.b.node(&bn, op, &[&conv])
    }

    pub fn conv_bias(&mut self, name: &str, x: &str, cin: usize, cout: usize, k: usize) -> String {
        let fan_in = cin * k * k;
        let a = (3.0 / fan_in as f32).sqrt();
        let w = self.rng.vec(cout * fan_in, -a, a);
        let bias = self.rng.vec(cout, -0.1, 0.1);
        let op = Op::Conv2d {
            weight: self
                .b
                .tensor(&format!("{name}.weight"), &[cout, cin, k, k], w),
            bias: Some(self.b.tensor(&format!("{name}.bias"), &[cout], bias)),
            stride: [1, 1],
            dilation: [1, 1],
            padding: [k / 2; 4],
            groups: 1,
        };
        self.b.node(name, op, &[x])
    }

    pub fn dense(&mut self, name: &str, x: &str, fin: usize, fout: usize) -> String {
        let a = (3.0 / fin as f32).sqrt();
        let w = self.rng.vec(fout * fin, -a, a);
        let bias = self.rng.vec(fout, -0.1, 0.1);
        let op = Op::Dense {
            weight: self.b.tensor(&format!("{name}.weight"), &[fout, fin], w),
            bias: Some(self.b.tensor(&format!("{name}.bias"), &[fout], bias)),
            weight_layout: Default::default(),
        };
        self.b.node(name, op, &[x])
    }

    pub fn op(&mut self, name: &str, op: Op, inputs: &[&str]) -> String {
        self.b.node(name, op, inputs)
    }

    /// Finishes as a bundle writer with `classes` logits.
    pub fn finish(self, model: &str, output: &str) -> BundleWriter {
        let (graph, tensors) = self.b.finish(output);
        let mut w = BundleWriter::new(
            model,
            "1",
            graph,
            InputSpec {
                shape: self.shape.clone(),
                image: None,
            },
            OutputSpec {
                labels: Vec::new(),
                kind: OutputKind::Logits,
            },
        )
        .description("random weights, for benchmarks and counts")
        .created("2026-12-01T00:00:00Z");
        for (name, shape, data) in tensors {
            // Names are unique by construction above.
            w.add_tensor(name, &shape, data).expect("unique tensor");
        }
        w
    }
}

/// LeNet-style: conv3x3(16)+relu, maxpool 2, conv3x3(32)+relu, maxpool 2, dense 1568→64, relu,
/// dense 64→10.
pub fn lenet28() -> BundleWriter {
    let mut n = Net::new(&[1, 28, 28], 1);
    let x = n.b.input();
    let c1 = n.conv_bias("conv1", &x, 1, 16, 3);
    let r1 = n.op("relu1", Op::Relu, &[&c1]);
    let pool = |k| Op::MaxPool {
        kernel: [k, k],
        stride: None,
        padding: [0; 4],
        dilation: [1, 1],
        ceil_mode: false,
    };
    let p1 = n.op("pool1", pool(2), &[&r1]);
    let c2 = n.conv_bias("conv2", &p1, 16, 32, 3);
    let r2 = n.op("relu2", Op::Relu, &[&c2]);
    let p2 = n.op("pool2", pool(2), &[&r2]);
    let f = n.op("flatten", Op::Flatten, &[&p2]);
    let d1 = n.dense("fc1", &f, 32 * 7 * 7, 64);
    let r3 = n.op("relu3", Op::Relu, &[&d1]);
    let d2 = n.dense("fc2", &r3, 64, 10);
    n.finish("lenet-28", &d2)
}

/// ResNet-20 for 32×32 inputs (He et al. 2016, §4.2): a 3×3 stem, three stages of three basic
/// blocks at 16, 32 and 64 channels, global average pooling and a 10-way dense layer.
pub fn resnet20() -> BundleWriter {
    let mut n = Net::new(&[3, 32, 32], 2);
    let x = n.b.input();
    let s = n.conv_bn("stem", &x, 3, 16, 3, 1, 1);
    let mut x = n.op("stem.relu", Op::Relu, &[&s]);
    let mut cin = 16;
    for (stage, (cout, stride)) in [(16, 1), (32, 2), (64, 2)].into_iter().enumerate() {
        for i in 0..3 {
            let st = if i == 0 { stride } else { 1 };
            let p = format!("s{stage}.b{i}");
            let a = n.conv_bn(&format!("{p}.c1"), &x, cin, cout, 3, st, 1);
            let a = n.op(&format!("{p}.relu1"), Op::Relu, &[&a]);
            let b = n.conv_bn(&format!("{p}.c2"), &a, cout, cout, 3, 1, 1);
            let short = if st == 1 && cin == cout {
                x.clone()
            } else {
                n.conv_bn(&format!("{p}.short"), &x, cin, cout, 1, st, 1)
            };
            let sum = n.op(
                &format!("{p}.add"),
                Op::Add { constant: None },
                &[&b, &short],
            );
            x = n.op(&format!("{p}.relu2"), Op::Relu, &[&sum]);
            cin = cout;
        }
    }
    let g = n.op("pool", Op::GlobalAvgPool, &[&x]);
    let f = n.op("flatten", Op::Flatten, &[&g]);
    let d = n.dense("fc", &f, 64, 10);
    n.finish("resnet20-32", &d)
}

/// MobileNetV2, width 1.0, 224×224, 1000 classes (Sandler et al. 2018, table 2).
pub fn mobilenet_v2() -> BundleWriter {
    let mut n = Net::new(&[3, 224, 224], 3);
    let relu6 = || Op::Clip { min: 0.0, max: 6.0 };
    let x = n.b.input();
    let s = n.conv_bn("stem", &x, 3, 32, 3, 2, 1);
    let mut x = n.op("stem.relu6", relu6(), &[&s]);
    let mut cin = 32;
    let settings = [
        (1, 16, 1, 1),
        (6, 24, 2, 2),
        (6, 32, 3, 2),
        (6, 64, 4, 2),
        (6, 96, 3, 1),
        (6, 160, 3, 2),
        (6, 320, 1, 1),
    ];
    let mut block = 0;
    for (t, c, reps, s) in settings {
        for i in 0..reps {
            let stride = if i == 0 { s } else { 1 };
            let p = format!("b{block}");
            let hidden = cin * t;
            let mut h = x.clone();
            if t != 1 {
                let e = n.conv_bn(&format!("{p}.expand"), &h, cin, hidden, 1, 1, 1);
                h = n.op(&format!("{p}.expand.relu6"), relu6(), &[&e]);
            }
            let d = n.conv_bn(&format!("{p}.dw"), &h, hidden, hidden, 3, stride, hidden);
            let d = n.op(&format!("{p}.dw.relu6"), relu6(), &[&d]);
            let proj = n.conv_bn(&format!("{p}.project"), &d, hidden, c, 1, 1, 1);
            x = if stride == 1 && cin == c {
                n.op(
                    &format!("{p}.add"),
                    Op::Add { constant: None },
                    &[&proj, &x],
                )
            } else {
                proj
            };
            cin = c;
            block += 1;
        }
    }
    let l = n.conv_bn("last", &x, cin, 1280, 1, 1, 1);
    let l = n.op("last.relu6", relu6(), &[&l]);
    let g = n.op("pool", Op::GlobalAvgPool, &[&l]);
    let f = n.op("flatten", Op::Flatten, &[&g]);
    let f = n.op("dropout", Op::Identity, &[&f]);
    let d = n.dense("classifier", &f, 1280, 1000);
    n.finish("mbv2-224", &d)
}
