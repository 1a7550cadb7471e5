//! Runs a batch through a plan, step by step, in buffers that are reused from batch to batch.
//!
//! Every kernel call covers one sample (dense layers: the batch as matrix columns, which the
//! GEMM computes column by column in a fixed order), so a sample's result never depends on
//! the batch it rides in.
//!
//! Memory: a batch goes through the plan in slices of at most [`Plan::slice_samples`] samples,
//! so a workspace holds the activations of one slice, not of the whole batch. Batch invariance
//! makes the slicing invisible in the results.

use super::kernels::gemm::{BSource, Epilogue, GemmScratch, PackedWeights, gemm};
use super::kernels::simd::Machine;
use super::kernels::{depthwise, elementwise, layout, norm, pool, vmath};
use super::plan::{ConvKind, ConvStep, Plan, StepKind};

/// Buffers for one slice of a batch at a time (see [`Plan::slice_samples`]); grow-only, so a
/// steady load allocates nothing.
#[derive(Default)]
pub struct Workspace {
    buffers: Vec<Vec<f32>>,
    gemm: GemmScratch,
    dense: Vec<f32>,
    /// Sums of layer norms and reductions.
    sums: Vec<f64>,
}

impl Workspace {
    pub fn new() -> Workspace {
        Workspace::default()
    }

    fn prepare(&mut self, plan: &Plan, batch: usize) {
        if self.buffers.len() < plan.buffer_len.len() {
            self.buffers.resize_with(plan.buffer_len.len(), Vec::new);
        }
        for (buf, &len) in self.buffers.iter_mut().zip(&plan.buffer_len) {
            if buf.len() < len * batch {
                buf.resize(len * batch, 0.0);
            }
        }
    }
}

/// Target size, in floats, of a workspace's value buffers (4 MiB, the order of a core's L2
/// cache). A slice of samples this large keeps a small network's batch together (LeNet at
/// 28×28 needs about 16 K floats per sample, so 66 samples fit), which lets its dense layers
/// run as one matrix multiply over the slice; a large network (MobileNetV2 at 224×224, about
/// 2.1 M floats per sample) runs one sample at a time instead of holding 270 MB for a batch of
/// 32. Measured with `convoy bench --local` at batch 32 on one thread (2-core AVX-512 server):
/// MobileNetV2 ran about 15% faster one sample at a time than the whole batch at once (its
/// activations stay in cache from layer to layer); LeNet lost about 13% one sample at a time
/// (matrix-vector dense layers) and none at 32; ResNet-20 was flat.
const WORKSPACE_FLOATS: usize = 1 << 20;

impl Plan {
    /// Samples one pass through the plan handles at most: as many as fit the workspace
    /// budget, at least one.
    pub fn slice_samples(&self) -> usize {
        let per_sample: usize = self.buffer_len.iter().sum();
        (WORKSPACE_FLOATS / per_sample.max(1)).max(1)
    }

    /// Runs `batch` samples laid out back to back in `input` and writes the graph output of
    /// each, back to back, to `output`. The caller checks the lengths (see `Engine::run`).
    pub(crate) fn run_unchecked(
        &self,
        input: &[f32],
        batch: usize,
        ws: &mut Workspace,
        output: &mut [f32],
    ) {
        self.run_in_slices(input, batch, ws, output, self.slice_samples());
    }

    /// [`Plan::run_unchecked`] with the slice size given (tests force small ones).
    fn run_in_slices(
        &self,
        input: &[f32],
        batch: usize,
        ws: &mut Workspace,
        output: &mut [f32],
        slice: usize,
    ) {
        if batch <= slice {
            return self.run_slice(input, batch, ws, output);
        }
        let in_len = self.value_len[self.input];
        let out_len = self.value_len[self.output];
        let mut start = 0;
        while start < batch {
            let n = slice.min(batch - start);
            self.run_slice(
                &input[start * in_len..(start + n) * in_len],
                n,
                ws,
                &mut output[start * out_len..(start + n) * out_len],
            );
            start += n;
        }
    }

    /// One pass of at most `slice_samples` samples.
    fn run_slice(&self, input: &[f32], batch: usize, ws: &mut Workspace, output: &mut [f32]) {
        ws.prepare(self, batch);
        let in_len = self.value_len[self.input];
        ws.buffers[self.value_buffer[self.input]][..in_len * batch].copy_from_slice(input);
        for step in &self.steps {
            let out_buf = self.value_buffer[step.output];
            let mut out = std::mem::take(&mut ws.buffers[out_buf]);
            self.run_step(step, batch, ws, &mut out);
            ws.buffers[out_buf] = out;
        }
        let out_len = self.value_len[self.output];
        output.copy_from_slice(&ws.buffers[self.value_buffer[self.output]][..out_len * batch]);
    }

    fn value<'a>(&self, buffers: &'a [Vec<f32>], v: usize, batch: usize) -> &'a [f32] {
        &buffers[self.value_buffer[v]][..self.value_len[v] * batch]
    }

    /// One step over the slice: convolutions and dense layers (which use the GEMM scratch),
    /// ops with two operands or several inputs, and the per-sample ops of one input.
    fn run_step(
        &self,
        step: &super::plan::Step,
        batch: usize,
        ws: &mut Workspace,
        out: &mut [f32],
    ) {
        let out_len = self.value_len[step.output];
        let in_len = self.value_len[step.inputs[0]];
        let out = &mut out[..out_len * batch];
        let Workspace {
            buffers,
            gemm: scratch,
            dense: tmp,
            sums,
        } = ws;
        let buffers = buffers.as_slice();
        let input = self.value(buffers, step.inputs[0], batch);
        match &step.kind {
            StepKind::Conv(conv) => {
                let residual = conv.residual.map(|r| self.value(buffers, r, batch));
                for s in 0..batch {
                    run_conv(
                        conv,
                        &input[s * in_len..][..in_len],
                        residual.map(|r| &r[s * out_len..][..out_len]),
                        &mut out[s * out_len..][..out_len],
                        scratch,
                    );
                }
            }
            StepKind::Dense {
                weights,
                bias,
                act,
                features,
            } => {
                let epi = Epilogue {
                    bias: bias.as_deref(),
                    residual: None,
                    act: *act,
                };
                dense(weights, &epi, *features, input, out, tmp, scratch);
            }
            StepKind::Binary {
                kind,
                how,
                swapped,
                constant,
            } => {
                let (b, b_len) = match constant {
                    Some(c) => (c.as_slice(), 0),
                    None => {
                        let v = step.inputs[1];
                        (self.value(buffers, v, batch), self.value_len[v])
                    }
                };
                let b_used = if constant.is_some() { b.len() } else { b_len };
                for s in 0..batch {
                    // A constant is shared by all samples; a value operand has one per sample.
                    elementwise::binary(
                        how,
                        *kind,
                        *swapped,
                        &input[s * in_len..][..in_len],
                        &b[s * b_len..][..b_used],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::Concat { outer, blocks } => {
                let mut parts: Vec<(&[f32], usize)> = Vec::with_capacity(blocks.len());
                for s in 0..batch {
                    parts.clear();
                    for (&v, &block) in step.inputs.iter().zip(blocks) {
                        let len = self.value_len[v];
                        parts.push((&self.value(buffers, v, batch)[s * len..][..len], block));
                    }
                    layout::concat(*outer, &parts, &mut out[s * out_len..][..out_len]);
                }
            }
            StepKind::Act(a) => {
                out.copy_from_slice(input);
                vmath::apply_on(Machine::new_or_scalar(self.isa), *a, out);
            }
            kind => {
                for s in 0..batch {
                    per_sample(
                        kind,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                        sums,
                    );
                }
            }
        }
    }
}

/// A dense layer over the last axis of `input` (every sample's positions back to back):
/// one GEMM whose columns are all positions of the slice.
fn dense(
    weights: &PackedWeights,
    epi: &Epilogue<'_>,
    features: usize,
    input: &[f32],
    out: &mut [f32],
    tmp: &mut Vec<f32>,
    scratch: &mut GemmScratch,
) {
    let columns = input.len() / features;
    let outputs = out.len() / columns;
    // C is [outputs, columns]; the value layout is [columns, outputs], so transpose after.
    if tmp.len() < out.len() {
        tmp.resize(out.len(), 0.0);
    }
    gemm(
        weights,
        &BSource::MatrixT {
            data: input,
            ld: features,
        },
        columns,
        0..columns,
        &mut tmp[..out.len()],
        columns,
        epi,
        scratch,
    );
    for c in 0..columns {
        for o in 0..outputs {
            out[c * outputs + o] = tmp[o * columns + c];
        }
    }
}

/// The ops that map one sample's input to its output alone.
fn per_sample(kind: &StepKind, input: &[f32], out: &mut [f32], sums: &mut Vec<f64>) {
    match kind {
        StepKind::Affine {
            scale,
            shift,
            inner,
        } => pool::channel_affine(scale, shift, *inner, input, out),
        StepKind::MaxPool(g) => pool::max_pool(g, input, out),
        StepKind::AvgPool {
            geom,
            count_include_pad,
        } => pool::avg_pool(geom, *count_include_pad, input, out),
        StepKind::GlobalAvgPool { c, plane } => pool::global_avg_pool(*c, *plane, input, out),
        StepKind::Softmax { c, inner } => pool::softmax(*c, *inner, input, out),
        StepKind::Pad {
            c,
            h,
            w,
            padding,
            channels,
            value,
        } => pool::pad([*c, *h, *w], *padding, *channels, *value, input, out),
        StepKind::Copy(c) => c.run(input, out),
        StepKind::Gather {
            outer,
            len,
            inner,
            indices,
        } => layout::gather(*outer, *len, *inner, indices, input, out),
        StepKind::LayerNorm {
            dims,
            scale,
            bias,
            epsilon,
        } => norm::layer_norm(*dims, scale, bias.as_deref(), *epsilon, input, out, sums),
        StepKind::Reduce(r) => r.run(input, out, sums),
        StepKind::Conv(_)
        | StepKind::Dense { .. }
        | StepKind::Binary { .. }
        | StepKind::Concat { .. }
        | StepKind::Act(_) => unreachable!("run by Plan::run_step"),
    }
}

/// One sample through one convolution.
fn run_conv(
    conv: &ConvStep,
    input: &[f32],
    residual: Option<&[f32]>,
    out: &mut [f32],
    scratch: &mut GemmScratch,
) {
    let g = &conv.geom;
    let n = g.out_h * g.out_w;
    match &conv.kind {
        ConvKind::Depthwise(w) => {
            let epi = Epilogue {
                bias: conv.bias.as_deref(),
                residual,
                act: conv.act,
            };
            depthwise::depthwise(w, g, input, out, 0..conv.out_c, &epi);
        }
        ConvKind::Gemm { groups, pointwise } => {
            let ocg = conv.out_c / conv.groups;
            let icg = g.in_c / conv.groups;
            let plane = g.in_h * g.in_w;
            for (gi, weights) in groups.iter().enumerate() {
                let rows = gi * ocg..(gi + 1) * ocg;
                let epi = Epilogue {
                    bias: conv.bias.as_deref().map(|b| &b[rows.clone()]),
                    residual: residual.map(|r| &r[rows.start * n..rows.end * n]),
                    act: conv.act,
                };
                let b = if *pointwise {
                    BSource::Matrix {
                        data: &input[gi * icg * plane..(gi + 1) * icg * plane],
                        ld: plane,
                    }
                } else {
                    BSource::Im2col {
                        input,
                        geom: *g,
                        c0: gi * icg,
                    }
                };
                gemm(
                    weights,
                    &b,
                    n,
                    0..n,
                    &mut out[rows.start * n..rows.end * n],
                    n,
                    &epi,
                    scratch,
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
    use crate::bundle::{Bundle, BundleWriter};
    use crate::engine::kernels::isa::Isa;
    use crate::graph::Op;
    use crate::graph::build::{GraphBuilder, SplitMix64};

    /// Convolution, ReLU, max pooling, dense: one step of each kind that treats the batch
    /// differently (per-sample kernels, and the dense layer's batch-wide matrix multiply).
    fn small_net() -> Bundle {
        let mut rng = SplitMix64::new(5);
        let mut b = GraphBuilder::new("x", &[2, 6, 6]);
        let x = b.input();
        let w = b.tensor("conv.w", &[4, 2, 3, 3], rng.vec(72, -0.5, 0.5));
        let c = b.node(
            "conv",
            Op::Conv2d {
                weight: w,
                bias: None,
                stride: [1, 1],
                dilation: [1, 1],
                padding: [1; 4],
                groups: 1,
            },
            &[&x],
        );
        let r = b.node("relu", Op::Relu, &[&c]);
        let p = b.node(
            "pool",
            Op::MaxPool {
                kernel: [2, 2],
                stride: None,
                padding: [0; 4],
                dilation: [1, 1],
                ceil_mode: false,
            },
            &[&r],
        );
        let f = b.node("flatten", Op::Flatten, &[&p]);
        let dw = b.tensor("fc.w", &[5, 36], rng.vec(180, -0.5, 0.5));
        let db = b.tensor("fc.b", &[5], rng.vec(5, -0.1, 0.1));
        let d = b.node(
            "fc",
            Op::Dense {
                weight: dw,
                bias: Some(db),
                weight_layout: Default::default(),
            },
            &[&f],
        );
        let (graph, tensors) = b.finish(&d);
        let mut w = BundleWriter::new(
            "slices",
            "1",
            graph,
            InputSpec {
                shape: vec![2, 6, 6],
                image: None,
            },
            OutputSpec {
                labels: Vec::new(),
                kind: OutputKind::Logits,
            },
        );
        for (name, shape, data) in tensors {
            w.add_tensor(name, &shape, data).unwrap();
        }
        Bundle::from_bytes(w.to_bytes().unwrap()).unwrap()
    }

    /// Slicing a batch must not change a single bit of any output: the executor's batch
    /// invariance (module docs), which the PyTorch reference tests check through the public
    /// API for batches that fit one slice.
    #[test]
    fn slices_do_not_change_results() {
        let bundle = small_net();
        let plan = Plan::new(&bundle, Isa::detect().unwrap());
        let batch = 7;
        let x = SplitMix64::new(9).vec(batch * plan.input_len(), -1.0, 1.0);
        let run = |slice: usize| {
            let mut out = vec![0.0; batch * plan.output_len()];
            plan.run_in_slices(&x, batch, &mut Workspace::new(), &mut out, slice);
            out.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
        };
        let whole = run(batch);
        for slice in [1, 2, 3, 6] {
            assert_eq!(run(slice), whole, "slices of {slice}");
        }
        assert!(
            plan.slice_samples() >= batch,
            "a small net keeps its batch together"
        );
    }
}
