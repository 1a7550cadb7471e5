//! Lowering: internal nodes to kernel steps with packed weights, and the buffer layout.

use super::fuse::{IrKind, IrNode};
use super::{ConvKind, ConvStep, Plan, Segments, Step, StepKind, ValueId};
use crate::engine::kernels::depthwise::PackedDepthwise;
use crate::engine::kernels::elementwise::Broadcast;
use crate::engine::kernels::gemm::{ConvGeom, PackedWeights};
use crate::engine::kernels::isa::Isa;
use crate::engine::kernels::layout::{merge_axes, row_major_strides};
use crate::engine::kernels::pool::PoolGeom;
use crate::engine::kernels::simd::Machine;
use crate::engine::kernels::winograd::{self, WinogradWeights};
use crate::graph::BinaryKind;

pub(super) fn lower(
    nodes: Vec<IrNode<'_>>,
    isa: Isa,
    value_shape: Vec<Vec<usize>>,
    alias_of: Vec<ValueId>,
    graph_output: ValueId,
    folded: Vec<String>,
) -> Plan {
    let value_len: Vec<usize> = value_shape.iter().map(|s| s.iter().product()).collect();
    let mut steps = Vec::with_capacity(nodes.len());
    for n in nodes {
        let mut inputs = n.inputs;
        let in_shape = &value_shape[inputs[0]];
        let out_shape = &value_shape[n.output];
        let kind = match n.kind {
            IrKind::Gone => continue,
            IrKind::Conv { .. } => conv(n.kind, isa, in_shape, out_shape),
            IrKind::Binary {
                kind,
                constant,
                constant_first,
            } => binary(
                kind,
                constant,
                constant_first,
                &mut inputs,
                &value_shape,
                out_shape,
            ),
            kind => other(kind, isa, &inputs, &value_shape, out_shape),
        };
        steps.push(Step {
            name: n.name,
            kind,
            inputs,
            output: n.output,
        });
    }
    let (mut value_buffer, buffers) = assign_buffers(&steps, &value_len, &alias_of, graph_output);
    let segments = split_segments(
        &steps,
        (&value_len, &alias_of, graph_output),
        &mut value_buffer,
        buffers,
    );
    Plan {
        isa,
        steps,
        input_shape: value_shape[0].clone(),
        output_shape: value_shape[graph_output].clone(),
        value_len,
        value_buffer,
        segments,
        input: 0,
        output: graph_output,
        folded,
    }
}

fn conv(kind: IrKind<'_>, isa: Isa, in_shape: &[usize], out_shape: &[usize]) -> StepKind {
    let IrKind::Conv {
        weight,
        bias,
        wshape,
        stride,
        dilation,
        padding,
        groups,
        residual,
        act,
    } = kind
    else {
        unreachable!("called for convolutions")
    };
    let [oc, icg, kh, kw] = wshape;
    let geom = ConvGeom {
        in_c: in_shape[0],
        in_h: in_shape[1],
        in_w: in_shape[2],
        kh,
        kw,
        stride_h: stride[0],
        stride_w: stride[1],
        dil_h: dilation[0],
        dil_w: dilation[1],
        pad_top: padding[0],
        pad_left: padding[1],
        out_h: out_shape[1],
        out_w: out_shape[2],
    };
    let kind = if groups > 1 && icg == 1 && groups == in_shape[0] {
        ConvKind::Depthwise(PackedDepthwise::pack(isa, &weight, oc, kh, kw))
    } else if winograd_pays(isa, &geom, groups, oc) {
        ConvKind::Winograd(WinogradWeights::pack(isa, &weight, oc, icg))
    } else {
        let ocg = oc / groups;
        let k = icg * kh * kw;
        let packed = (0..groups)
            .map(|g| PackedWeights::pack(isa, &weight[g * ocg * k..(g + 1) * ocg * k], ocg, k))
            .collect();
        let pointwise = kh == 1 && kw == 1 && stride == [1, 1] && padding == [0, 0, 0, 0];
        ConvKind::Gemm {
            groups: packed,
            pointwise,
        }
    };
    StepKind::Conv(Box::new(ConvStep {
        geom,
        groups,
        out_c: oc,
        kind,
        bias,
        residual,
        act,
    }))
}

/// Whether a convolution runs by Winograd's F(4×4, 3×3) rather than as one GEMM: it must fit
/// the route (3×3, stride 1, one group), and have channels enough on both sides that the
/// input transform (shared by all output channels) and the output transform (shared by all
/// input channels) cost little next to the multiply-adds they save.
///
/// Its 36 GEMMs have one column per 4×4 tile and read four times the weights a direct GEMM
/// does, so a small plane makes them short and the weight traffic dominates: they pay only
/// with tiles enough to reuse each transformed weight.
fn winograd_pays(isa: Isa, geom: &ConvGeom, groups: usize, out_c: usize) -> bool {
    let tiles = geom.out_h.div_ceil(winograd::TILE) * geom.out_w.div_ceil(winograd::TILE);
    // Where the direct GEMM route reads its input through masked loads, it runs more layers
    // faster than Winograd does.
    let min_tiles = if Machine::new_or_scalar(isa).fast_masked_load() {
        WINOGRAD_MIN_TILES_MASKED
    } else {
        WINOGRAD_MIN_TILES
    };
    winograd::fits(geom, groups)
        && geom.in_c >= WINOGRAD_MIN_CHANNELS
        && out_c >= WINOGRAD_MIN_CHANNELS
        && tiles >= min_tiles
}

// The limits of [`winograd_pays`], measured with `convoy bench --local --steps`, one thread.
// 2-core AVX-512 Xeon, 2026-12-05, ResNet-18 at 224 px, batch 1: its 512-channel 7×7 layers
// (4 tiles) took 7.0–7.2 ms each by Winograd and 4.1–4.8 ms as one GEMM, its 256-channel
// 14×14 layers (16 tiles) 4.6–4.9 ms against 2.3–2.9 ms, while its 64-channel 56×56 layers
// (196 tiles) took 2.3–2.4 ms by Winograd against 2.8–2.9 ms; the whole network went from 13.8
// to 19.0 images/s. (An AVX2 EPYC, the same day, had run the 512-channel layers
// 10–15 % faster by Winograd: its caches fed the fourfold weights better.) Earlier, AVX2:
// LeNet's 16 → 32 layer at 14×14 ran 10–25 % faster as one GEMM, ResNet-20's 16 → 16 layers
// at 32×32 the same either way. Later the same day, once the direct GEMM route read its input
// with masked loads, its 128-channel 28×28 layers (49 tiles) took 1.57–1.65 ms as one GEMM
// against 1.73–1.96 ms by Winograd at batch 1 (47–49 against 55–61 ms at batch 32, 0.84–0.92
// against 1.04–1.32 ms on two threads), while the 56×56 layers still ran faster by Winograd on
// one thread (1.41–1.52 against 1.60–1.68 ms; 47–50 against 52–59 ms at batch 32). Hence a
// limit between 49 and 196 tiles where that route applies (AVX-512); the others keep 32.
const WINOGRAD_MIN_CHANNELS: usize = 32;
const WINOGRAD_MIN_TILES: usize = 32;
const WINOGRAD_MIN_TILES_MASKED: usize = 100;

/// Every kind but convolutions and binary ops.
fn other(
    kind: IrKind<'_>,
    isa: Isa,
    inputs: &[ValueId],
    value_shape: &[Vec<usize>],
    out_shape: &[usize],
) -> StepKind {
    let in_shape = &value_shape[inputs[0]];
    let product = |s: &[usize]| -> usize { s.iter().product() };
    match kind {
        IrKind::Dense {
            weight,
            bias,
            out,
            act,
        } => StepKind::Dense {
            weights: PackedWeights::pack(isa, &weight, out, weight.len() / out),
            bias,
            act,
            features: in_shape[in_shape.len() - 1],
        },
        IrKind::BatchNorm {
            gamma,
            beta,
            mean,
            variance,
            epsilon,
        } => {
            let mut scale = Vec::with_capacity(gamma.len());
            let mut shift = Vec::with_capacity(gamma.len());
            for c in 0..gamma.len() {
                let s = f64::from(gamma[c]) / (f64::from(variance[c]) + f64::from(epsilon)).sqrt();
                scale.push(s as f32);
                shift.push((f64::from(beta[c]) - f64::from(mean[c]) * s) as f32);
            }
            StepKind::Affine {
                scale,
                shift,
                inner: product(&in_shape[1..]),
            }
        }
        IrKind::Act(a) => StepKind::Act(a),
        IrKind::MaxPool {
            kernel,
            stride,
            padding,
            dilation,
        } => StepKind::MaxPool(pool_geom(
            in_shape, out_shape, kernel, stride, padding, dilation,
        )),
        IrKind::AvgPool {
            kernel,
            stride,
            padding,
            count_include_pad,
        } => StepKind::AvgPool {
            geom: pool_geom(in_shape, out_shape, kernel, stride, padding, [1, 1]),
            count_include_pad,
        },
        IrKind::GlobalAvgPool => StepKind::GlobalAvgPool {
            c: in_shape[0],
            plane: product(&in_shape[1..]),
        },
        IrKind::Softmax => StepKind::Softmax {
            c: in_shape[0],
            inner: product(&in_shape[1..]),
        },
        IrKind::Pad {
            padding,
            channels,
            value,
        } => StepKind::Pad {
            c: in_shape[0],
            h: in_shape[1],
            w: in_shape[2],
            padding,
            channels,
            value,
        },
        kind => layout(kind, inputs, value_shape),
    }
}

/// The ops that move or normalise data along axes.
fn layout(kind: IrKind<'_>, inputs: &[ValueId], value_shape: &[Vec<usize>]) -> StepKind {
    let in_shape = &value_shape[inputs[0]];
    let product = |s: &[usize]| -> usize { s.iter().product() };
    match kind {
        IrKind::Concat { axis } => StepKind::Concat {
            outer: product(&in_shape[..axis]),
            blocks: inputs
                .iter()
                .map(|&v| product(&value_shape[v][axis..]))
                .collect(),
        },
        IrKind::Copy(c) => StepKind::Copy(c),
        IrKind::Gather { axis, indices } => StepKind::Gather {
            outer: product(&in_shape[..axis]),
            len: in_shape[axis],
            inner: product(&in_shape[axis + 1..]),
            indices,
        },
        IrKind::LayerNorm {
            scale,
            bias,
            axis,
            count,
            epsilon,
        } => StepKind::LayerNorm {
            dims: [
                product(&in_shape[..axis]),
                product(&in_shape[axis..axis + count]),
                product(&in_shape[axis + count..]),
            ],
            scale,
            bias,
            epsilon,
        },
        IrKind::Reduce(r) => StepKind::Reduce(r),
        _ => unreachable!("every other kind is lowered by the callers"),
    }
}

/// Broadcast strides of an operand of shape `shape` against the output `out`: 0 on axes
/// where the operand has size 1. The older per-channel `[C]` form stands for `[C, 1, 1]`, and
/// `[1]` for all ones.
fn operand_strides(shape: &[usize], out: &[usize]) -> Vec<isize> {
    let full: Vec<usize> = if shape.len() == out.len() {
        shape.to_vec()
    } else if shape == [1] {
        vec![1; out.len()]
    } else {
        let mut s = shape.to_vec();
        s.resize(out.len(), 1);
        s
    };
    let strides = row_major_strides(&full);
    (0..out.len())
        .map(|d| {
            if full[d] == 1 && out[d] != 1 {
                0
            } else {
                strides[d]
            }
        })
        .collect()
}

/// A binary op: the operand with the output's shape goes first where the op allows, so the
/// common layouts (equal, per channel, scalar) get their own loops.
fn binary(
    kind: BinaryKind,
    constant: Option<(Vec<f32>, Vec<usize>)>,
    constant_first: bool,
    inputs: &mut [ValueId],
    value_shape: &[Vec<usize>],
    out_shape: &[usize],
) -> StepKind {
    let (b_shape, mut swapped) = match &constant {
        Some((_, s)) => (s.clone(), constant_first),
        None => (value_shape[inputs[1]].clone(), false),
    };
    let mut a_shape = value_shape[inputs[0]].clone();
    let mut b_shape = b_shape;
    let a_full = a_shape == out_shape;
    if constant.is_none() && !a_full && b_shape == out_shape {
        // Put the full-size value first; the `swapped` flag keeps the operand order.
        inputs.swap(0, 1);
        std::mem::swap(&mut a_shape, &mut b_shape);
        swapped = true;
    }
    let constant = constant.map(|(v, _)| v);
    let b_len: usize = b_shape.iter().product();
    let how = if a_shape == out_shape && b_shape == out_shape {
        Broadcast::Full
    } else if a_shape == out_shape && b_len == 1 {
        Broadcast::Scalar
    } else if a_shape == out_shape && per_channel(&b_shape, out_shape) {
        Broadcast::PerChannel {
            inner: out_shape[1..].iter().product(),
        }
    } else {
        let sa = operand_strides(&a_shape, out_shape);
        let sb = operand_strides(&b_shape, out_shape);
        let (shape, [a, b]) = merge_axes(out_shape, [&sa, &sb]);
        Broadcast::General { shape, a, b }
    };
    StepKind::Binary {
        kind,
        how,
        swapped,
        constant,
    }
}

/// `[C, 1, ...]` (or the older `[C]` of `[C, H, W]`) against an output `[C, ...]`.
fn per_channel(b: &[usize], out: &[usize]) -> bool {
    let same_rank = b.len() == out.len() && b[0] == out[0] && b[1..].iter().all(|&d| d == 1);
    out.len() > 1 && (same_rank || (out.len() == 3 && b == [out[0]]))
}

/// Each step's output gets a free buffer; a buffer is freed after the last step that reads
/// any value stored in it. A step's output never shares a buffer with its inputs. Returns
/// each value's buffer and the number of buffers (their sizes follow from the values they
/// hold: [`Segments`]).
fn assign_buffers(
    steps: &[Step],
    value_len: &[usize],
    alias_of: &[ValueId],
    graph_output: ValueId,
) -> (Vec<usize>, usize) {
    let n_values = value_len.len();
    let mut last_use = vec![0usize; n_values];
    for (i, s) in steps.iter().enumerate() {
        for v in reads(s) {
            last_use[alias_of[v]] = last_use[alias_of[v]].max(i);
        }
    }
    last_use[alias_of[graph_output]] = usize::MAX;
    let mut value_buffer = vec![usize::MAX; n_values];
    let mut buffer_len: Vec<usize> = vec![value_len[0]];
    value_buffer[0] = 0;
    let mut free: Vec<usize> = Vec::new();
    let mut live: Vec<ValueId> = vec![0];
    for (i, s) in steps.iter().enumerate() {
        let need = value_len[s.output];
        // Best fit: the smallest free buffer that is large enough, else grow the largest.
        let pick = free
            .iter()
            .enumerate()
            .filter(|(_, b)| buffer_len[**b] >= need)
            .min_by_key(|(_, b)| buffer_len[**b])
            .or_else(|| free.iter().enumerate().max_by_key(|(_, b)| buffer_len[**b]))
            .map(|(pos, _)| pos);
        let buf = match pick {
            Some(pos) => free.swap_remove(pos),
            None => {
                buffer_len.push(0);
                buffer_len.len() - 1
            }
        };
        buffer_len[buf] = buffer_len[buf].max(need);
        value_buffer[s.output] = buf;
        live.push(s.output);
        live.retain(|&v| {
            if last_use[v] <= i {
                free.push(value_buffer[v]);
                false
            } else {
                true
            }
        });
    }
    for v in 0..n_values {
        value_buffer[v] = value_buffer[alias_of[v]];
    }
    (value_buffer, buffer_len.len())
}

/// The values a step reads: its inputs and a fused residual.
fn reads(s: &Step) -> impl Iterator<Item = ValueId> + '_ {
    s.inputs.iter().copied().chain(match &s.kind {
        StepKind::Conv(c) => c.residual,
        _ => None,
    })
}

/// Whether a step's weights outweigh one sample's input and output: such a layer gains from
/// meeting many samples per read of its weights. Depthwise convolutions never do (a handful
/// of weights per channel), nor do steps without weights.
fn weights_dominate(s: &Step, value_len: &[usize]) -> bool {
    let weights = match &s.kind {
        StepKind::Conv(c) if !matches!(c.kind, ConvKind::Depthwise(_)) => {
            let g = &c.geom;
            c.out_c * (g.in_c / c.groups) * g.kh * g.kw
        }
        StepKind::Dense { weights, .. } => weights.m() * weights.k(),
        _ => return false,
    };
    weights >= value_len[s.inputs[0]] + value_len[s.output]
}

/// Cuts the plan after its last convolution or dense layer whose weights do not outweigh one
/// sample's activations (see [`Segments`]), and gives every value that crosses the cut a
/// buffer of its own (a head value that shared it would overwrite the samples already kept).
/// `buffers`: how many [`assign_buffers`] made.
fn split_segments(
    steps: &[Step],
    (value_len, alias_of, graph_output): (&[usize], &[ValueId], ValueId),
    value_buffer: &mut [usize],
    mut buffers: usize,
) -> Segments {
    let light = |s: &Step| {
        matches!(s.kind, StepKind::Conv(_) | StepKind::Dense { .. })
            && !weights_dominate(s, value_len)
    };
    let cut = steps.iter().rposition(light).map_or(0, |i| i + 1);
    let n_values = value_len.len();
    // Roots produced in the head: the input and the outputs of steps before the cut.
    let mut in_head = vec![false; n_values];
    in_head[0] = true;
    for s in &steps[..cut] {
        in_head[s.output] = true;
    }
    let mut whole = vec![false; n_values];
    for s in &steps[cut..] {
        for v in reads(s) {
            whole[alias_of[v]] |= in_head[alias_of[v]];
        }
    }
    whole[alias_of[graph_output]] |= in_head[alias_of[graph_output]];
    for root in (0..n_values).filter(|&v| whole[v] && alias_of[v] == v) {
        for v in (0..n_values).filter(|&v| alias_of[v] == root) {
            value_buffer[v] = buffers;
        }
        buffers += 1;
    }
    let mut head_len = vec![0; buffers];
    let mut tail_len = vec![0; buffers];
    for root in (0..n_values).filter(|&v| alias_of[v] == v && value_buffer[v] != usize::MAX) {
        let lens = if in_head[root] && !whole[root] {
            &mut head_len
        } else {
            &mut tail_len
        };
        let b = value_buffer[root];
        lens[b] = lens[b].max(value_len[root]);
    }
    for v in 0..n_values {
        whole[v] = whole[alias_of[v]];
    }
    Segments {
        cut,
        whole,
        head_len,
        tail_len,
    }
}

fn pool_geom(
    in_shape: &[usize],
    out_shape: &[usize],
    kernel: [usize; 2],
    stride: [usize; 2],
    padding: [usize; 4],
    dilation: [usize; 2],
) -> PoolGeom {
    PoolGeom {
        c: in_shape[0],
        in_h: in_shape[1],
        in_w: in_shape[2],
        out_h: out_shape[1],
        out_w: out_shape[2],
        kernel,
        stride,
        dilation,
        padding,
    }
}
