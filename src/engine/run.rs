//! Runs a batch through a plan, step by step, in buffers that are reused from batch to batch.
//!
//! Every kernel call covers one sample (dense layers: the batch as matrix columns, which the
//! GEMM computes column by column in a fixed order), so a sample's result never depends on
//! the batch it rides in.
//!
//! Threads: a pass may be given a thread pool ([`Team`]); each large enough step of a sample
//! is then spread over the pool's threads: convolutions by output columns, rows of weights,
//! channels (depthwise) or groups; dense layers by rows of weights; element-wise ops and
//! pools by channels or runs of elements. Every output element is computed by the same kernel
//! sequence whichever part it falls in (see `kernels::gemm`), so the results do not depend on
//! the thread count. Small steps, and the cheap ones that move data (copies, concatenation,
//! padding), run on the thread that runs the pass.
//!
//! Memory and order: a batch goes through the plan in slices of at most
//! [`Plan::slice_samples`] samples, so a workspace holds the activations of one slice, not of
//! the whole batch. Within a slice, the head of the plan runs a chunk of samples at a time
//! (large activations, small weights: they stay in cache from step to step) and the tail runs
//! the whole slice at once (small activations, large weights: read once per slice rather than
//! once per sample); see `plan::Segments`. Batch invariance makes slices and chunks invisible
//! in the results.

use std::ops::Range;
use std::time::{Duration, Instant};

use rayon_core::ThreadPool;

use super::kernels::activation::Activation;
use super::kernels::aligned::AlignedBuf;
use super::kernels::elementwise::Broadcast;
use super::kernels::gemm::{BSource, Band, Epilogue, GemmScratch, PackedWeights, gemm_band};
use super::kernels::pool::PoolGeom;
use super::kernels::simd::Machine;
use super::kernels::{depthwise, elementwise, layout, norm, pool, vmath, winograd};
use super::plan::{ConvKind, ConvStep, Plan, StepKind};
use crate::graph::BinaryKind;

/// Buffers for one slice of a batch at a time (see [`Plan::slice_samples`]); grow-only, so a
/// steady load allocates no activations. Each convolution still allocates the short lists
/// that describe its parts (`share`, `planes`, `Band::split`), one part on one thread.
#[derive(Default)]
pub struct Workspace {
    /// The activations, each starting on a cache line. With the allocator's 16-byte
    /// alignment, measured (2026-12-05, 2-core AVX-512 server, chains of 1×1 layers at batch
    /// 1): each thread's half of a 28×28 layer took 78 µs beside the other thread against
    /// 50 µs alone (aligned: 59), and 56×56 layers took 25% longer on one thread.
    buffers: Vec<AlignedBuf>,
    /// One per part a step is spread over (one without a [`Team`]).
    parts: Vec<PartScratch>,
    dense: Vec<f32>,
    /// Sums of layer norms and reductions.
    sums: Vec<f64>,
    /// Time spent in each step of the plan, when asked for ([`Workspace::timing_steps`]).
    step_times: Option<Vec<Duration>>,
}

impl Workspace {
    pub fn new() -> Workspace {
        Workspace::default()
    }

    /// A workspace that adds up the time of each step of the passes it runs.
    pub(crate) fn timing_steps() -> Workspace {
        Workspace {
            step_times: Some(Vec::new()),
            ..Workspace::default()
        }
    }

    /// Time spent in each step of the plan so far (empty unless built by
    /// [`Workspace::timing_steps`]).
    pub(crate) fn step_times(&self) -> &[Duration] {
        self.step_times.as_deref().unwrap_or_default()
    }

    /// Buffers for a pass of `batch` samples whose head goes `chunk` samples at a time.
    fn prepare(&mut self, plan: &Plan, (batch, chunk): (usize, usize), parts: usize) {
        if self.parts.len() < parts {
            self.parts.resize_with(parts, PartScratch::default);
        }
        if let Some(times) = &mut self.step_times {
            times.resize(plan.steps.len(), Duration::ZERO);
        }
        let seg = &plan.segments;
        if self.buffers.len() < seg.head_len.len() {
            self.buffers
                .resize_with(seg.head_len.len(), AlignedBuf::default);
        }
        for (buf, (&head, &tail)) in self
            .buffers
            .iter_mut()
            .zip(seg.head_len.iter().zip(&seg.tail_len))
        {
            let need = (head * chunk).max(tail * batch);
            if buf.len() < need {
                buf.set_len(need);
            }
        }
    }
}

/// What one part of a spread step works in.
#[derive(Default)]
struct PartScratch {
    gemm: GemmScratch,
    /// Transformed tiles of a Winograd convolution.
    winograd: AlignedBuf,
}

/// Target size, in floats, of a workspace's buffers for the head of a pass (4 MiB, the order
/// of a core's L2 cache; see `Segments`). A chunk of samples this large keeps a small
/// network's batch together (LeNet at 28×28 needs about 16 K floats per sample, so 66 samples
/// fit); a large network's head (MobileNetV2 at 224×224, about 2.1 M floats per sample) runs
/// one sample at a time instead of holding 270 MB for a batch of 32. Measured with `convoy
/// bench --local` at batch 32 on one thread (2-core AVX-512 server): MobileNetV2 ran about 15%
/// faster one sample at a time than the whole batch at once (its activations stay in cache
/// from layer to layer); LeNet lost about 13% one sample at a time (matrix-vector dense
/// layers) and none at 32; ResNet-20 was flat.
const HEAD_FLOATS: usize = 1 << 20;

/// Target size, in floats, of the buffers for the tail of a pass (16 MiB): tens of samples of
/// the small late activations, so that each tail layer reads its weights once for all of them.
/// Measured (2026-12-05, same server, batch 32, one thread): ResNet-18's 512-channel 7×7
/// layers, whose 9.4 MB of weights were read once per sample, ran at 63–70 GFLOP/s one sample
/// at a time and 96–104 with the batch together; MobileNetV2, EfficientNet-B0 and ShuffleNetV2
/// lost 5–15% when their whole network took the batch together, hence the head.
const TAIL_FLOATS: usize = 1 << 22;

/// The samples a step runs over: `count` of them from sample `first` of the pass.
#[derive(Clone, Copy, Debug)]
struct Samples {
    first: usize,
    count: usize,
}

/// The threads one pass may spread a step over: the pool's, from inside the pool (the engine
/// runs such a pass with `ThreadPool::install`). `None`: the calling thread alone.
pub(crate) type Team<'p> = Option<&'p ThreadPool>;

fn team_parts(team: Team<'_>) -> usize {
    team.map_or(1, ThreadPool::current_num_threads)
}

impl Plan {
    /// Whether one sample is worth spreading over threads: at least about a millisecond of
    /// convolutions (at 10 billion multiply-adds per second), against the tens of
    /// microseconds of handing the pass to the pool and back.
    pub(crate) fn worth_spreading(&self) -> bool {
        let total: usize = self
            .steps
            .iter()
            .map(|s| match &s.kind {
                StepKind::Conv(c) => c.multiply_adds(),
                _ => 0,
            })
            .sum();
        total >= 10_000_000
    }

    /// Samples the head of a pass takes at a time: as many as fit [`HEAD_FLOATS`], at least
    /// one.
    fn chunk_samples(&self) -> usize {
        let per_sample: usize = self.segments.head_len.iter().sum();
        (HEAD_FLOATS / per_sample.max(1)).max(1)
    }

    /// Samples one pass through the plan handles at most: as many as the tail's buffers fit
    /// in [`TAIL_FLOATS`], and at least a head chunk.
    pub fn slice_samples(&self) -> usize {
        let chunk = self.chunk_samples();
        if self.segments.cut == self.steps.len() {
            return chunk;
        }
        let per_sample: usize = self.segments.tail_len.iter().sum();
        (TAIL_FLOATS / per_sample.max(1)).max(chunk)
    }

    /// Runs `batch` samples laid out back to back in `input` and writes the graph output of
    /// each, back to back, to `output`. The caller checks the lengths (see `Engine::run`).
    pub(crate) fn run_unchecked(
        &self,
        input: &[f32],
        batch: usize,
        ws: &mut Workspace,
        output: &mut [f32],
        team: Team<'_>,
    ) {
        let sizes = (self.slice_samples(), self.chunk_samples());
        self.run_in_slices(input, batch, ws, output, sizes, team);
    }

    /// [`Plan::run_unchecked`] with the slice and head chunk sizes given (tests force small
    /// ones).
    fn run_in_slices(
        &self,
        input: &[f32],
        batch: usize,
        ws: &mut Workspace,
        output: &mut [f32],
        (slice, chunk): (usize, usize),
        team: Team<'_>,
    ) {
        if batch <= slice {
            return self.run_slice(input, (batch, chunk), ws, output, team);
        }
        let in_len = self.value_len[self.input];
        let out_len = self.value_len[self.output];
        let mut start = 0;
        while start < batch {
            let n = slice.min(batch - start);
            self.run_slice(
                &input[start * in_len..(start + n) * in_len],
                (n, chunk),
                ws,
                &mut output[start * out_len..(start + n) * out_len],
                team,
            );
            start += n;
        }
    }

    /// One pass of at most `slice_samples` samples: the head chunk by chunk, then the tail
    /// over all of them.
    fn run_slice(
        &self,
        input: &[f32],
        (batch, chunk): (usize, usize),
        ws: &mut Workspace,
        output: &mut [f32],
        team: Team<'_>,
    ) {
        let seg = &self.segments;
        let chunk = chunk.clamp(1, batch.max(1));
        ws.prepare(self, (batch, chunk), team_parts(team));
        let in_len = self.value_len[self.input];
        let in_buf = self.value_buffer[self.input];
        if seg.whole[self.input] {
            ws.buffers[in_buf][..in_len * batch].copy_from_slice(input);
        }
        if seg.cut > 0 {
            for first in (0..batch).step_by(chunk) {
                let samples = Samples {
                    first,
                    count: chunk.min(batch - first),
                };
                if !seg.whole[self.input] {
                    let part = &input[first * in_len..][..samples.count * in_len];
                    ws.buffers[in_buf][..part.len()].copy_from_slice(part);
                }
                self.run_steps(0..seg.cut, samples, ws, team);
            }
        }
        let all = Samples {
            first: 0,
            count: batch,
        };
        self.run_steps(seg.cut..self.steps.len(), all, ws, team);
        output.copy_from_slice(self.value(&ws.buffers, self.output, all));
    }

    /// Steps `range` over `samples`.
    fn run_steps(&self, range: Range<usize>, samples: Samples, ws: &mut Workspace, team: Team<'_>) {
        for (index, step) in self.steps[range.clone()].iter().enumerate() {
            let out_buf = self.value_buffer[step.output];
            let mut out = std::mem::take(&mut ws.buffers[out_buf]);
            let start = ws.step_times.is_some().then(Instant::now);
            let at = self.offset(step.output, samples);
            let out_len = self.value_len[step.output];
            let dst = &mut out[at..][..out_len * samples.count];
            self.run_step(step, samples, ws, dst, team);
            if let (Some(start), Some(times)) = (start, &mut ws.step_times) {
                times[range.start + index] += start.elapsed();
            }
            ws.buffers[out_buf] = out;
        }
    }

    /// Where `samples` of value `v` start in its buffer: values kept whole across the cut hold
    /// every sample of the pass, the others only the current chunk.
    fn offset(&self, v: usize, samples: Samples) -> usize {
        if self.segments.whole[v] {
            samples.first * self.value_len[v]
        } else {
            0
        }
    }

    fn value<'a>(&self, buffers: &'a [AlignedBuf], v: usize, samples: Samples) -> &'a [f32] {
        let at = self.offset(v, samples);
        &buffers[self.value_buffer[v]][at..][..self.value_len[v] * samples.count]
    }

    /// One step over the slice: convolutions and dense layers (which use the GEMM scratch),
    /// ops with two operands or several inputs, and the per-sample ops of one input.
    fn run_step(
        &self,
        step: &super::plan::Step,
        samples: Samples,
        ws: &mut Workspace,
        out: &mut [f32],
        team: Team<'_>,
    ) {
        let batch = samples.count;
        let out_len = self.value_len[step.output];
        let in_len = self.value_len[step.inputs[0]];
        let Workspace {
            buffers,
            parts: scratches,
            dense: tmp,
            sums,
            ..
        } = ws;
        let scratches = &mut scratches[..team_parts(team)];
        let buffers = buffers.as_slice();
        let input = self.value(buffers, step.inputs[0], samples);
        match &step.kind {
            StepKind::Conv(conv) => {
                let residual = conv.residual.map(|r| self.value(buffers, r, samples));
                for s in 0..batch {
                    run_conv(
                        conv,
                        &input[s * in_len..][..in_len],
                        residual.map(|r| &r[s * out_len..][..out_len]),
                        &mut out[s * out_len..][..out_len],
                        (scratches, team),
                    );
                }
            }
            StepKind::Dense {
                weights,
                bias,
                act,
                features,
            } => {
                let layer = (weights, bias.as_deref(), *act, *features);
                dense(layer, input, out, tmp, (scratches, team));
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
                        (self.value(buffers, v, samples), self.value_len[v])
                    }
                };
                let b_used = if constant.is_some() { b.len() } else { b_len };
                for s in 0..batch {
                    // A constant is shared by all samples; a value operand has one per sample.
                    binary_spread(
                        (how, *kind, *swapped),
                        &input[s * in_len..][..in_len],
                        &b[s * b_len..][..b_used],
                        &mut out[s * out_len..][..out_len],
                        (scratches, team),
                    );
                }
            }
            StepKind::MaxPool(_) | StepKind::AvgPool { .. } | StepKind::GlobalAvgPool { .. } => {
                let machine = Machine::new_or_scalar(self.isa);
                pool_step(machine, &step.kind, input, out, (scratches, team));
            }
            StepKind::Concat { outer, blocks } => {
                self.concat(&step.inputs, (*outer, blocks), buffers, samples, out);
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

impl Plan {
    /// Each sample's `inputs`, seen as `[outer, blocks[i]]`, joined block by block into `out`.
    fn concat(
        &self,
        inputs: &[usize],
        (outer, blocks): (usize, &[usize]),
        buffers: &[AlignedBuf],
        samples: Samples,
        out: &mut [f32],
    ) {
        let batch = samples.count;
        let out_len = out.len() / batch;
        let mut parts: Vec<(&[f32], usize)> = Vec::with_capacity(blocks.len());
        for s in 0..batch {
            parts.clear();
            for (&v, &block) in inputs.iter().zip(blocks) {
                let len = self.value_len[v];
                parts.push((&self.value(buffers, v, samples)[s * len..][..len], block));
            }
            layout::concat(outer, &parts, &mut out[s * out_len..][..out_len]);
        }
    }
}

/// A dense layer over the last axis of `input` (every sample's positions back to back):
/// one GEMM whose columns are all positions of the slice.
fn dense(
    (weights, bias, act, features): (&PackedWeights, Option<&[f32]>, Activation, usize),
    input: &[f32],
    out: &mut [f32],
    tmp: &mut Vec<f32>,
    (scratches, team): (&mut [PartScratch], Team<'_>),
) {
    let epi = Epilogue {
        bias,
        residual: None,
        act,
    };
    let columns = input.len() / features;
    let outputs = out.len() / columns;
    let b = BSource::MatrixT {
        data: input,
        ld: features,
    };
    // C is [outputs, columns]; the value layout is [columns, outputs], so one column is C
    // itself, and more are transposed after.
    let c = if columns == 1 {
        &mut *out
    } else {
        if tmp.len() < out.len() {
            tmp.resize(out.len(), 0.0);
        }
        &mut tmp[..out.len()]
    };
    // A layer is shared out by rows of weights (every part reads only its own): the one
    // image of a pass on several threads meets a dense layer as a matrix-vector product
    // whose time is the weights' reading.
    let (scratches, team) = team_for(
        outputs * columns * features,
        SPREAD_MIN_MULTIPLY_ADDS,
        (scratches, team),
    );
    let rows = share(outputs, scratches.len(), weights.panel_rows());
    let bands = Band::split_rows(c, outputs, columns, 0..columns, &rows);
    spread(team, bands, scratches, |c, part| {
        gemm_band(weights, &b, columns, c, &epi, &mut part.gemm);
    });
    if columns > 1 {
        for c in 0..columns {
            for o in 0..outputs {
                out[c * outputs + o] = tmp[o * columns + c];
            }
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
        | StepKind::GlobalAvgPool { .. }
        | StepKind::MaxPool(_)
        | StepKind::AvgPool { .. }
        | StepKind::Concat { .. }
        | StepKind::Act(_) => unreachable!("run by Plan::run_step"),
    }
}

/// One sample through one convolution, spread over the team's threads (one part per
/// scratch).
fn run_conv(
    conv: &ConvStep,
    input: &[f32],
    residual: Option<&[f32]>,
    out: &mut [f32],
    (scratches, team): (&mut [PartScratch], Team<'_>),
) {
    let g = &conv.geom;
    let n = g.out_h * g.out_w;
    let (scratches, team) = team_for(
        conv.multiply_adds(),
        SPREAD_MIN_MULTIPLY_ADDS,
        (scratches, team),
    );
    let parts = scratches.len();
    match &conv.kind {
        ConvKind::Depthwise(w) => {
            // Channels are independent planes: contiguous, disjoint parts of the output.
            let chunks = planes(out, residual, n, &share(conv.out_c, parts, 1));
            spread(team, chunks, scratches, |(channels, o, r), _| {
                let epi = Epilogue {
                    bias: conv.bias.as_deref(),
                    residual: r,
                    act: conv.act,
                };
                depthwise::depthwise(w, g, input, o, channels, &epi);
            });
        }
        ConvKind::Winograd(w) => {
            // Whole rows of tiles: each part a contiguous range of every channel's columns.
            let rows = share(g.out_h.div_ceil(winograd::TILE), parts, 1);
            let cols: Vec<Range<usize>> = rows
                .iter()
                .map(|r| {
                    r.start * winograd::TILE * g.out_w
                        ..(r.end * winograd::TILE).min(g.out_h) * g.out_w
                })
                .collect();
            let bands = Band::split(out, conv.out_c, n, &cols);
            let epi = Epilogue {
                bias: conv.bias.as_deref(),
                residual,
                act: conv.act,
            };
            spread(team, bands, scratches, |c, part| {
                let scratch = (&mut part.winograd, &mut part.gemm);
                winograd::conv_band(w, g, input, c, &epi, scratch);
            });
        }
        ConvKind::Gemm { groups, pointwise } => {
            let ocg = conv.out_c / conv.groups;
            let group = GroupGemm {
                conv,
                input,
                residual,
                pointwise: *pointwise,
                n,
                ocg,
            };
            if groups.len() >= parts && parts > 1 {
                // Enough groups for every thread: each takes whole groups (contiguous rows).
                let chunks = planes(out, None, ocg * n, &share(groups.len(), parts, 1));
                spread(team, chunks, scratches, |(range, o, _), part| {
                    for (i, gi) in range.clone().enumerate() {
                        let c = Band::new(&mut o[i * ocg * n..][..ocg * n], ocg, n, 0..n);
                        group.run(&groups[gi], gi, c, &mut part.gemm);
                    }
                });
            } else {
                // Few groups (most often one): split each one's output columns, or its rows
                // where a part's columns would fill few register tiles (small planes) or
                // share a cache line with the next part's in every row.
                let cols = share(n, parts, COLUMN_STEP);
                for (gi, weights) in groups.iter().enumerate() {
                    let o = &mut out[gi * ocg * n..(gi + 1) * ocg * n];
                    let by_rows = parts > 1
                        && ocg.div_ceil(weights.panel_rows()) >= parts
                        && (n < ROWS_BELOW_COLUMNS * parts || !n.is_multiple_of(COLUMN_STEP));
                    let bands = if by_rows {
                        let rows = share(ocg, parts, weights.panel_rows());
                        Band::split_rows(o, ocg, n, 0..n, &rows)
                    } else {
                        Band::split(o, ocg, n, &cols)
                    };
                    spread(team, bands, scratches, |c, part| {
                        group.run(weights, gi, c, &mut part.gemm);
                    });
                }
            }
        }
    }
}

/// Convolutions of fewer multiply-adds per sample run on one thread: about 25 µs of work at
/// 10 billion multiply-adds per second, a few times what waking and joining the team costs.
const SPREAD_MIN_MULTIPLY_ADDS: usize = 1 << 18;

/// Column parts start at multiples of this: whole vectors for every instruction set's
/// microkernel, and whole cache lines (16 floats) of every row whose length is a multiple of
/// 16, so that no line is written by two threads (the workspace's buffers start on one). With 8,
/// EfficientNet-B0's 28×28 plane split at column 392 and its 1×1 layers ran no faster on two
/// threads than on one.
const COLUMN_STEP: usize = 16;

/// A GEMM is shared out by output rows rather than columns when its parts would get fewer
/// columns each than this, or when its rows are not whole cache lines (then every row would
/// have a line written by two threads). A 7×7 plane (49 columns) cut in two halves of 24 and 25
/// columns fills two half-empty AVX-512 tiles per half; cut by rows, every tile is the one a
/// single thread would run. Measured (2026-12-05, 2-core AVX-512 server, batch 1 on two
/// threads): EfficientNet-B0's 1×1 layers at 7×7 took 1.3–1.9 ms instead of 2.5; a chain of
/// 1×1 layers at 14×14 (196 columns) ran 1.39 times as fast as on one thread by rows, 1.14
/// by columns.
const ROWS_BELOW_COLUMNS: usize = 64;

/// Elementwise steps of fewer output floats per sample run on one thread (a squeeze-and-
/// excitation scale at 7×7 with 1,152 channels has 56 K; at 112×112 with 32, 401 K): below
/// this, a few microseconds of work against the team's wake-up and join.
const SPREAD_MIN_ELEMENTS: usize = 1 << 16;

/// A binary op on one sample, its output shared out over the team by whole channels
/// (per-channel operand) or runs of elements (same-shape or scalar operand) where it is large
/// enough; other broadcasts run here. Every element is the same operation whichever part
/// computes it.
fn binary_spread(
    (how, kind, swapped): (&Broadcast, BinaryKind, bool),
    a: &[f32],
    b: &[f32],
    out: &mut [f32],
    (scratches, team): (&mut [PartScratch], Team<'_>),
) {
    let unit = match how {
        Broadcast::PerChannel { inner } => *inner,
        Broadcast::Full | Broadcast::Scalar => 1,
        Broadcast::General { .. } => 0,
    };
    let size = if unit == 0 { 0 } else { out.len() };
    let (scratches, team) = team_for(size, SPREAD_MIN_ELEMENTS, (scratches, team));
    if team.is_none() {
        return elementwise::binary(how, kind, swapped, a, b, out);
    }
    let units = out.len() / unit;
    let ranges = share(units, scratches.len(), COLUMN_STEP);
    let chunks = planes(out, Some(a), unit, &ranges);
    spread(team, chunks, scratches, |(r, o, a_part), _| {
        let b_part = match how {
            Broadcast::Scalar => b,
            _ => &b[r],
        };
        let a_part = a_part.expect("planes was given the operand");
        elementwise::binary(how, kind, swapped, a_part, b_part, o);
    });
}

/// A step whose output channel `k` reads input channel `k` alone (the pools), over the samples
/// of `input` (`[c, in_plane]` each) into `out` (`[c, out_plane]` each), each sample's channels
/// shared out over the team where its input is large enough: `f(channels, x, o)` computes
/// `channels` from their input planes `x` into their output planes `o`.
fn by_channels(
    (c, in_plane, out_plane): (usize, usize, usize),
    input: &[f32],
    out: &mut [f32],
    (scratches, team): (&mut [PartScratch], Team<'_>),
    f: impl Fn(Range<usize>, &[f32], &mut [f32]) + Sync,
) {
    let (scratches, team) = team_for(c * in_plane, SPREAD_MIN_ELEMENTS, (scratches, team));
    for (x, o) in input
        .chunks_exact(c * in_plane)
        .zip(out.chunks_exact_mut(c * out_plane))
    {
        if team.is_none() {
            f(0..c, x, o);
            continue;
        }
        let ranges = share(c, scratches.len(), 1);
        let chunks = planes(o, None, out_plane, &ranges);
        spread(team, chunks, &mut *scratches, |(r, o, _), _| {
            f(r.clone(), &x[r.start * in_plane..r.end * in_plane], o);
        });
    }
}

/// A pooling step over the samples of `input` into `out`, shared out by channels
/// ([`by_channels`]).
fn pool_step(
    machine: Machine,
    kind: &StepKind,
    input: &[f32],
    out: &mut [f32],
    (scratches, team): (&mut [PartScratch], Team<'_>),
) {
    let window_sizes = |g: &PoolGeom| (g.c, g.in_h * g.in_w, g.out_h * g.out_w);
    match kind {
        StepKind::MaxPool(g) => {
            by_channels(window_sizes(g), input, out, (scratches, team), |r, x, o| {
                pool::max_pool(machine, &PoolGeom { c: r.len(), ..*g }, x, o);
            });
        }
        StepKind::AvgPool {
            geom: g,
            count_include_pad,
        } => {
            by_channels(window_sizes(g), input, out, (scratches, team), |r, x, o| {
                pool::avg_pool(&PoolGeom { c: r.len(), ..*g }, *count_include_pad, x, o);
            });
        }
        StepKind::GlobalAvgPool { c, plane } => {
            by_channels((*c, *plane, 1), input, out, (scratches, team), |r, x, o| {
                pool::global_avg_pool(r.len(), *plane, x, o);
            });
        }
        _ => unreachable!("not a pooling step"),
    }
}

/// The team one step of `size` units of work shares: none, and one scratch, below `min`
/// (the work is over before the other threads would have woken up) or when the team has a
/// single thread.
fn team_for<'s, 'p>(
    size: usize,
    min: usize,
    (scratches, team): (&'s mut [PartScratch], Team<'p>),
) -> (&'s mut [PartScratch], Team<'p>) {
    if size < min || scratches.len() < 2 {
        (&mut scratches[..1], None)
    } else {
        (scratches, team)
    }
}

/// One group of a convolution run as a GEMM.
struct GroupGemm<'a> {
    conv: &'a ConvStep,
    input: &'a [f32],
    residual: Option<&'a [f32]>,
    pointwise: bool,
    n: usize,
    ocg: usize,
}

impl GroupGemm<'_> {
    /// Group `gi` with `weights` into `c`, which covers the group's rows.
    fn run(&self, weights: &PackedWeights, gi: usize, c: Band<'_>, scratch: &mut GemmScratch) {
        let conv = self.conv;
        let g = &conv.geom;
        let (n, ocg) = (self.n, self.ocg);
        let icg = g.in_c / conv.groups;
        let plane = g.in_h * g.in_w;
        let rows = gi * ocg..(gi + 1) * ocg;
        let epi = Epilogue {
            bias: conv.bias.as_deref().map(|b| &b[rows.clone()]),
            residual: self.residual.map(|r| &r[rows.start * n..rows.end * n]),
            act: conv.act,
        };
        let b = if self.pointwise {
            BSource::Matrix {
                data: &self.input[gi * icg * plane..(gi + 1) * icg * plane],
                ld: plane,
            }
        } else {
            BSource::Im2col {
                input: self.input,
                geom: *g,
                c0: gi * icg,
            }
        };
        gemm_band(weights, &b, n, c, &epi, scratch);
    }
}

/// `0..len` cut into at most `parts` non-empty ranges of near-equal length, inner bounds at
/// multiples of `step`.
fn share(len: usize, parts: usize, step: usize) -> Vec<Range<usize>> {
    let units = len.div_ceil(step);
    let parts = parts.clamp(1, units.max(1));
    let mut ranges = Vec::with_capacity(parts);
    let mut start = 0;
    for p in 1..=parts {
        let end = (units * p / parts * step).min(len);
        if end > start {
            ranges.push(start..end);
            start = end;
        }
    }
    ranges
}

/// Units `.0` of a step's output (`.1`) and of its residual (`.2`).
type Chunk<'a> = (Range<usize>, &'a mut [f32], Option<&'a [f32]>);

/// The output (and residual) cut at `ranges` of units of `unit` floats each: contiguous,
/// disjoint slices.
fn planes<'a>(
    out: &'a mut [f32],
    residual: Option<&'a [f32]>,
    unit: usize,
    ranges: &[Range<usize>],
) -> Vec<Chunk<'a>> {
    let mut rest = out;
    let mut taken = 0;
    ranges
        .iter()
        .map(|r| {
            let (o, tail) = std::mem::take(&mut rest).split_at_mut((r.end - taken) * unit);
            let o = &mut o[(r.start - taken) * unit..];
            rest = tail;
            taken = r.end;
            let res = residual.map(|x| &x[r.start * unit..r.end * unit]);
            (r.clone(), o, res)
        })
        .collect()
}

/// Runs `f` on every part, each with its own scratch: the first on this thread, the others on
/// the team's (or all here without one). Returns when all have finished.
fn spread<T: Send>(
    team: Team<'_>,
    parts: Vec<T>,
    scratches: &mut [PartScratch],
    f: impl Fn(T, &mut PartScratch) + Sync,
) {
    assert!(parts.len() <= scratches.len(), "a part without a scratch");
    let mut work = parts.into_iter().zip(scratches.iter_mut());
    match team {
        Some(pool) if work.len() > 1 => pool.scope(|scope| {
            let first = work.next();
            let f = &f;
            for (part, scratch) in work {
                scope.spawn(move |_| f(part, scratch));
            }
            if let Some((part, scratch)) = first {
                f(part, scratch);
            }
        }),
        _ => work.for_each(|(part, scratch)| f(part, scratch)),
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
        let d = b.dense("fc", dw, Some(db), &f);
        bundle_of("slices", b, &d, &[2, 6, 6])
    }

    /// The bundle of `b`'s graph up to `output`, with raw outputs.
    fn bundle_of(name: &str, b: GraphBuilder, output: &str, shape: &[usize]) -> Bundle {
        let (graph, tensors) = b.finish(output);
        let mut w = BundleWriter::new(
            name,
            "1",
            graph,
            InputSpec {
                shape: shape.to_vec(),
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

    /// `batch` samples of `input` through `plan` in one pass without a team, checked to give
    /// the same bits on teams of 2 and 3 threads; returns the output without a team.
    fn run_on_teams(plan: &Plan, input: &[f32], batch: usize) -> Vec<f32> {
        let run = |team: Team<'_>| {
            let mut out = vec![0.0; batch * plan.output_len()];
            let sizes = (batch, batch);
            plan.run_in_slices(input, batch, &mut Workspace::new(), &mut out, sizes, team);
            out
        };
        let alone = run(None);
        let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        for threads in [2, 3] {
            let pool = rayon_core::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let spread = pool.install(|| run(Some(&pool)));
            assert_eq!(bits(&spread), bits(&alone), "{threads} threads");
        }
        alone
    }

    /// Two 3×3 convolutions, 32 → 32 channels at 40×40 (100 tiles: the Winograd route), the
    /// second with a residual add of the block's input and a ReLU fused in: bundle, plan and
    /// runner around `kernels::winograd`.
    fn winograd_block() -> (Bundle, Vec<f32>, Vec<f32>) {
        const C: usize = 32;
        const S: usize = 40;
        let mut rng = SplitMix64::new(21);
        let mut b = GraphBuilder::new("x", &[C, S, S]);
        let x = b.input();
        let (w1, b1) = (rng.vec(C * C * 9, -0.1, 0.1), rng.vec(C, -0.1, 0.1));
        let w2 = rng.vec(C * C * 9, -0.1, 0.1);
        let conv = |b: &mut GraphBuilder, name: &str, w: &str, bias: Option<String>, x: &str| {
            b.node(
                name,
                Op::Conv2d {
                    weight: w.to_string(),
                    bias,
                    stride: [1, 1],
                    dilation: [1, 1],
                    padding: [1; 4],
                    groups: 1,
                },
                &[x],
            )
        };
        let t1 = b.tensor("c1.w", &[C, C, 3, 3], w1.clone());
        let tb = b.tensor("c1.b", &[C], b1.clone());
        let c1 = conv(&mut b, "c1", &t1, Some(tb), &x);
        let t2 = b.tensor("c2.w", &[C, C, 3, 3], w2.clone());
        let c2 = conv(&mut b, "c2", &t2, None, &c1);
        let add = b.node("add", Op::Add { constant: None }, &[&c2, &x]);
        let out = b.node("relu", Op::Relu, &[&add]);
        let bundle = bundle_of("winograd", b, &out, &[C, S, S]);
        let mut weights = w1;
        weights.extend(b1);
        weights.extend(w2);
        (bundle, weights, rng.vec(C * S * S, -1.0, 1.0))
    }

    /// The definition of the block above in double precision: 3×3 cross-correlation with zero
    /// padding 1 (common practice; PyTorch's `Conv2d` documents the same sum).
    fn winograd_block_reference(weights: &[f32], x: &[f32]) -> Vec<f64> {
        const C: usize = 32;
        const S: usize = 40;
        let conv = |w: &[f32], x: &[f64]| {
            let mut y = vec![0.0f64; C * S * S];
            for o in 0..C {
                for oy in 0..S {
                    for ox in 0..S {
                        let mut acc = 0.0;
                        for c in 0..C {
                            for i in 0..3 {
                                for j in 0..3 {
                                    let (iy, ix) = (oy + i, ox + j);
                                    if (1..=S).contains(&iy) && (1..=S).contains(&ix) {
                                        acc += f64::from(w[((o * C + c) * 3 + i) * 3 + j])
                                            * x[(c * S + iy - 1) * S + ix - 1];
                                    }
                                }
                            }
                        }
                        y[(o * S + oy) * S + ox] = acc;
                    }
                }
            }
            y
        };
        let (w1, rest) = weights.split_at(C * C * 9);
        let (b1, w2) = rest.split_at(C);
        let x: Vec<f64> = x.iter().map(|&v| f64::from(v)).collect();
        let mut y1 = conv(w1, &x);
        for (i, v) in y1.iter_mut().enumerate() {
            *v += f64::from(b1[i / (S * S)]);
        }
        let y2 = conv(w2, &y1);
        y2.iter().zip(&x).map(|(a, b)| (a + b).max(0.0)).collect()
    }

    #[test]
    fn winograd_steps_match_the_definition_on_any_thread_count() {
        let (bundle, weights, x) = winograd_block();
        let plan = Plan::new(&bundle, Isa::detect().unwrap());
        let routes: Vec<bool> = plan
            .steps
            .iter()
            .filter_map(|s| match &s.kind {
                StepKind::Conv(c) => Some(matches!(c.kind, ConvKind::Winograd(_))),
                _ => None,
            })
            .collect();
        assert_eq!(routes, [true, true], "both convolutions by Winograd");
        let want = winograd_block_reference(&weights, &x);
        let scale = want.iter().fold(1.0f64, |m, v| m.max(v.abs()));
        let alone = run_on_teams(&plan, &x, 1);
        for (k, (&got, &w)) in alone.iter().zip(&want).enumerate() {
            // The project's tolerance rule (tests/reference/README.md).
            assert!(
                (f64::from(got) - w).abs() <= 1e-4 * scale,
                "output {k}: {got} vs {w}"
            );
        }
    }

    /// A squeeze-and-excitation-like tail large enough to be shared out over threads: the
    /// input scaled by its own channel means (per-channel operand), then added to itself
    /// (same-shape operand). Against the definition in f64 (common practice: the mean of a
    /// plane, then an elementwise product and sum), and bit for bit on 1, 2 and 3 threads.
    #[test]
    fn scale_by_channel_means_on_any_thread_count() {
        let (c, h, w) = (20, 60, 60); // 72,000 floats: over SPREAD_MIN_ELEMENTS
        let mut b = GraphBuilder::new("x", &[c, h, w]);
        let x = b.input();
        let mean = b.node("gap", Op::GlobalAvgPool, &[&x]);
        let scaled = b.node("scale", Op::Mul { constant: None }, &[&x, &mean]);
        let sum = b.node("sum", Op::Add { constant: None }, &[&scaled, &x]);
        let bundle = bundle_of("scale", b, &sum, &[c, h, w]);
        let plan = Plan::new(&bundle, Isa::detect().unwrap());
        let lined_up: Vec<bool> = plan
            .steps
            .iter()
            .filter_map(|s| match &s.kind {
                StepKind::Binary { how, .. } => Some(matches!(
                    how,
                    Broadcast::PerChannel { .. } | Broadcast::Full
                )),
                _ => None,
            })
            .collect();
        assert_eq!(lined_up, [true, true], "both ops are shared out");
        let input = SplitMix64::new(12).vec(c * h * w, -1.0, 1.0);
        let alone = run_on_teams(&plan, &input, 1);
        let plane = h * w;
        for ch in 0..c {
            let xs = &input[ch * plane..][..plane];
            let m = xs.iter().map(|&v| f64::from(v)).sum::<f64>() / plane as f64;
            for (k, &v) in xs.iter().enumerate() {
                let want = f64::from(v) * m + f64::from(v);
                let got = f64::from(alone[ch * plane + k]);
                assert!(
                    (got - want).abs() <= 1e-5,
                    "channel {ch}, {k}: {got} vs {want}"
                );
            }
        }
    }

    /// Max and average pooling (3×3 windows, stride 2, padding 1, as ResNet's stem pools) on
    /// an input large enough to be shared out by channels: against the definition in f64
    /// (PyTorch's `MaxPool2d` and `AvgPool2d` with `count_include_pad=False` document the same
    /// windows) and bit for bit on 1, 2 and 3 threads.
    #[test]
    fn pools_on_any_thread_count() {
        let (c, h, w) = (20, 60, 60); // 72,000 floats: over SPREAD_MIN_ELEMENTS
        let input = SplitMix64::new(41).vec(c * h * w, -1.0, 1.0);
        let (oh, ow) = (30, 30);
        for max in [true, false] {
            let (kernel, stride, padding) = ([3, 3], Some([2, 2]), [1; 4]);
            let op = if max {
                Op::MaxPool {
                    kernel,
                    stride,
                    padding,
                    dilation: [1, 1],
                    ceil_mode: false,
                }
            } else {
                Op::AvgPool {
                    kernel,
                    stride,
                    padding,
                    ceil_mode: false,
                    count_include_pad: false,
                }
            };
            let mut b = GraphBuilder::new("x", &[c, h, w]);
            let x = b.input();
            let y = b.node("pool", op, &[&x]);
            let plan = Plan::new(
                &bundle_of("pool", b, &y, &[c, h, w]),
                Isa::detect().unwrap(),
            );
            let alone = run_on_teams(&plan, &input, 1);
            for (k, &got) in alone.iter().enumerate() {
                let (ch, oy, ox) = (k / (oh * ow), k / ow % oh, k % ow);
                let taps: Vec<f64> = (0..9)
                    .filter_map(|t| {
                        let (y, x) = (
                            (2 * oy + t / 3).checked_sub(1)?,
                            (2 * ox + t % 3).checked_sub(1)?,
                        );
                        (y < h && x < w).then(|| f64::from(input[(ch * h + y) * w + x]))
                    })
                    .collect();
                let want = if max {
                    taps.iter().copied().fold(f64::NEG_INFINITY, f64::max)
                } else {
                    taps.iter().sum::<f64>() / taps.len() as f64
                };
                assert!(
                    (f64::from(got) - want).abs() <= 1e-6,
                    "{max} output {k}: {got} vs {want}"
                );
            }
        }
    }

    /// A dense layer of one image large enough to be shared out by rows of weights (a
    /// matrix-vector product of 700 x 500 multiply-adds, over SPREAD_MIN_MULTIPLY_ADDS), and a
    /// small one after it that is not: against the definition in f64 (common practice: PyTorch's
    /// `Linear` documents `y = x W^T + b`) and bit for bit on 1, 2 and 3 threads, with one
    /// sample and with two (a team's pass holds fewer samples than threads).
    #[test]
    fn dense_layers_on_any_thread_count() {
        let (features, hidden, classes) = (700, 500, 10);
        let mut rng = SplitMix64::new(31);
        let mut b = GraphBuilder::new("x", &[features]);
        let x = b.input();
        let w1 = rng.vec(hidden * features, -0.1, 0.1);
        let b1 = rng.vec(hidden, -0.1, 0.1);
        let w2 = rng.vec(classes * hidden, -0.1, 0.1);
        let t1 = b.tensor("d1.w", &[hidden, features], w1.clone());
        let tb = b.tensor("d1.b", &[hidden], b1.clone());
        let d1 = b.dense("d1", t1, Some(tb), &x);
        let t2 = b.tensor("d2.w", &[classes, hidden], w2.clone());
        let d2 = b.dense("d2", t2, None, &d1);
        let bundle = bundle_of("dense", b, &d2, &[features]);
        let plan = Plan::new(&bundle, Isa::detect().unwrap());
        for batch in [1, 2] {
            let input = rng.vec(batch * features, -1.0, 1.0);
            let alone = run_on_teams(&plan, &input, batch);
            for s in 0..batch {
                let xs = &input[s * features..][..features];
                let h: Vec<f64> = (0..hidden)
                    .map(|o| {
                        let row = &w1[o * features..][..features];
                        let dot: f64 = row
                            .iter()
                            .zip(xs)
                            .map(|(&w, &v)| f64::from(w) * f64::from(v))
                            .sum();
                        dot + f64::from(b1[o])
                    })
                    .collect();
                for k in 0..classes {
                    let row = &w2[k * hidden..][..hidden];
                    let want: f64 = row.iter().zip(&h).map(|(&w, &v)| f64::from(w) * v).sum();
                    let got = f64::from(alone[s * classes + k]);
                    assert!(
                        (got - want).abs() <= 1e-4,
                        "sample {s}, class {k}: {got} vs {want}"
                    );
                }
            }
        }
    }

    /// Slicing a batch, and chunking the head of a pass, must not change a single bit of any
    /// output: the executor's batch invariance (module docs), which the PyTorch reference
    /// tests check through the public API for batches that fit one slice.
    #[test]
    fn slices_do_not_change_results() {
        for bundle in [small_net(), residual_across_the_cut()] {
            let plan = Plan::new(&bundle, Isa::detect().unwrap());
            let batch = 7;
            let x = SplitMix64::new(9).vec(batch * plan.input_len(), -1.0, 1.0);
            let run = |sizes: (usize, usize)| {
                let mut out = vec![0.0; batch * plan.output_len()];
                plan.run_in_slices(&x, batch, &mut Workspace::new(), &mut out, sizes, None);
                out.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
            };
            let whole = run((batch, batch));
            for slice in [1, 2, 3, 6] {
                for chunk in 1..=slice {
                    assert_eq!(
                        run((slice, chunk)),
                        whole,
                        "slices of {slice}, chunks of {chunk}"
                    );
                }
            }
            assert!(
                plan.slice_samples() >= batch,
                "a small net keeps its batch together"
            );
        }
    }

    /// A light convolution (few weights, larger activations) whose output a heavy one reads
    /// both as input and as fused residual, then a dense layer: the cut falls between the two
    /// convolutions and the light one's output crosses it.
    fn residual_across_the_cut() -> Bundle {
        let mut rng = SplitMix64::new(6);
        let mut b = GraphBuilder::new("x", &[2, 8, 8]);
        let x = b.input();
        let conv =
            |b: &mut GraphBuilder, rng: &mut SplitMix64, name: &str, in_c, stride, x: &str| {
                let n = 16 * in_c * 9;
                let w = b.tensor(
                    &format!("{name}.w"),
                    &[16, in_c, 3, 3],
                    rng.vec(n, -0.3, 0.3),
                );
                b.node(
                    name,
                    Op::Conv2d {
                        weight: w,
                        bias: None,
                        stride: [stride, stride],
                        dilation: [1, 1],
                        padding: [1; 4],
                        groups: 1,
                    },
                    &[x],
                )
            };
        let c1 = conv(&mut b, &mut rng, "light", 2, 2, &x);
        let c2 = conv(&mut b, &mut rng, "heavy", 16, 1, &c1);
        let sum = b.node("add", Op::Add { constant: None }, &[&c2, &c1]);
        let f = b.node("flatten", Op::Flatten, &[&sum]);
        let dw = b.tensor("fc.w", &[5, 256], rng.vec(1280, -0.1, 0.1));
        let d = b.dense("fc", dw, None, &f);
        bundle_of("cut", b, &d, &[2, 8, 8])
    }

    /// The cut falls after the last layer whose weights do not outweigh its activations, and
    /// the values read across it are kept whole, each in a buffer no other value uses.
    #[test]
    fn the_cut_keeps_crossing_values_whole() {
        let plan = Plan::new(&residual_across_the_cut(), Isa::Scalar);
        let seg = &plan.segments;
        let names: Vec<&str> = plan.steps.iter().map(|s| s.name.as_str()).collect();
        assert_eq!(seg.cut, 1, "steps {names:?}");
        let light = plan.steps[0].output;
        assert!(
            seg.whole[light],
            "the light convolution's output crosses the cut"
        );
        assert!(!seg.whole[plan.input], "the input is read in the head only");
        let own = plan.value_buffer[light];
        let sharing = (0..plan.value_len.len())
            .filter(|&v| plan.value_buffer[v] == own)
            .count();
        assert_eq!(sharing, 1, "a crossing value has its buffer to itself");
        assert_eq!(seg.head_len[own], 0);
        assert_eq!(seg.tail_len[own], plan.value_len[light]);
    }

    /// The parts a step is spread over cover its units exactly once, in order, with inner
    /// bounds on the step; fewer parts when there are fewer units.
    #[test]
    fn shares_cover_every_unit_once() {
        for len in [1, 7, 8, 49, 196, 3136, 12544] {
            for parts in 1..=5 {
                for step in [1, 8] {
                    let ranges = share(len, parts, step);
                    assert!(!ranges.is_empty() && ranges.len() <= parts);
                    assert_eq!(ranges[0].start, 0);
                    assert_eq!(ranges.last().map(|r| r.end), Some(len));
                    for pair in ranges.windows(2) {
                        assert_eq!(pair[0].end, pair[1].start);
                        assert_eq!(pair[0].end % step, 0, "{len} {parts} {step}");
                    }
                    assert!(ranges.iter().all(|r| !r.is_empty()));
                    let longest = ranges.iter().map(Range::len).max().unwrap_or(0);
                    assert!(longest <= len.div_ceil(parts).next_multiple_of(step) + step);
                }
            }
        }
        assert_eq!(share(49, 2, 8), [0..24, 24..49]);
    }
}
