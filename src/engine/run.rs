//! Runs a batch through a plan, step by step, in buffers that are reused from batch to batch.
//!
//! Every kernel call covers one sample (dense layers: the batch as matrix columns, which the
//! GEMM computes column by column in a fixed order), so a sample's result never depends on
//! the batch it rides in.

use super::kernels::gemm::{BSource, Epilogue, GemmScratch, gemm};
use super::kernels::{depthwise, pool};
use super::plan::{ConvKind, ConvStep, Plan, StepKind};

/// Buffers for one batch size at a time; grow-only, so a steady load allocates nothing.
#[derive(Default)]
pub struct Workspace {
    buffers: Vec<Vec<f32>>,
    gemm: GemmScratch,
    dense: Vec<f32>,
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

impl Plan {
    /// Runs `batch` samples laid out back to back in `input` and writes the graph output of
    /// each, back to back, to `output`. The caller checks the lengths (see `Engine::run`).
    pub(crate) fn run_unchecked(
        &self,
        input: &[f32],
        batch: usize,
        ws: &mut Workspace,
        output: &mut [f32],
    ) {
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
        } = ws;
        let buffers = buffers.as_slice();
        match &step.kind {
            StepKind::Conv(conv) => {
                let residual = conv.residual.map(|r| self.value(buffers, r, batch));
                let input = self.value(buffers, step.inputs[0], batch);
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
            StepKind::Dense { weights, bias, act } => {
                let input = self.value(buffers, step.inputs[0], batch);
                // C is [out, batch]; the value layout is [batch, out], so transpose after.
                if tmp.len() < out_len * batch {
                    tmp.resize(out_len * batch, 0.0);
                }
                let epi = Epilogue {
                    bias: bias.as_deref(),
                    residual: None,
                    act: *act,
                };
                gemm(
                    weights,
                    &BSource::MatrixT {
                        data: input,
                        ld: in_len,
                    },
                    batch,
                    0..batch,
                    &mut tmp[..out_len * batch],
                    batch,
                    &epi,
                    scratch,
                );
                for s in 0..batch {
                    for o in 0..out_len {
                        out[s * out_len + o] = tmp[o * batch + s];
                    }
                }
            }
            StepKind::Affine {
                scale,
                shift,
                inner,
            } => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::channel_affine(
                        scale,
                        shift,
                        *inner,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::Act(a) => {
                out.copy_from_slice(self.value(buffers, step.inputs[0], batch));
                a.apply_slice(out);
            }
            StepKind::MaxPool(g) => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::max_pool(
                        g,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::AvgPool {
                geom,
                count_include_pad,
            } => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::avg_pool(
                        geom,
                        *count_include_pad,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::GlobalAvgPool { c, plane } => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::global_avg_pool(
                        *c,
                        *plane,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::Binary { mul, how, constant } => {
                let a = self.value(buffers, step.inputs[0], batch);
                let (b, b_len) = match constant {
                    Some(c) => (c.as_slice(), 0),
                    None => {
                        let v = step.inputs[1];
                        (self.value(buffers, v, batch), self.value_len[v])
                    }
                };
                let b_len_used = match how {
                    pool::Broadcast::Full => in_len,
                    pool::Broadcast::PerChannel { inner } => in_len / inner,
                    pool::Broadcast::Scalar => 1,
                };
                for s in 0..batch {
                    // A constant is shared by all samples; a value operand has one per sample.
                    let b_s = &b[s * b_len..][..b_len_used];
                    pool::binary(
                        *how,
                        *mul,
                        &a[s * in_len..][..in_len],
                        b_s,
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::Concat { sizes } => {
                for s in 0..batch {
                    let mut at = s * out_len;
                    for (&v, &len) in step.inputs.iter().zip(sizes) {
                        let src = &self.value(buffers, v, batch)[s * len..][..len];
                        out[at..at + len].copy_from_slice(src);
                        at += len;
                    }
                }
            }
            StepKind::Softmax { c, inner } => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::softmax(
                        *c,
                        *inner,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
            StepKind::Pad {
                c,
                h,
                w,
                padding,
                value,
            } => {
                let input = self.value(buffers, step.inputs[0], batch);
                for s in 0..batch {
                    pool::pad(
                        *c,
                        *h,
                        *w,
                        *padding,
                        *value,
                        &input[s * in_len..][..in_len],
                        &mut out[s * out_len..][..out_len],
                    );
                }
            }
        }
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
