//! Ops that only move, pick or reshape data: Reshape, Flatten, Squeeze/Unsqueeze,
//! Transpose, Slice, Split, Gather, Concat, Expand, Tile, Pad — and the batch bookkeeping
//! their targets need (the batch axis must stay first and whole).

use super::elementwise::Simple;
use super::{BATCH, Converter, Ctx, Val};
use crate::graph::shapes::MAX_RANK;
use crate::graph::{AxisRange, Op};
use crate::import::ImportError;
use crate::import::onnx::attr::{attr_int_checked, attr_ints_checked, attr_string_checked};
use crate::import::onnx::proto::onnx::NodeProto;

impl Converter {
    pub(super) fn reshape(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let target = match inputs.get(1) {
            Some(Some(Val::Const(t))) => t.to_i64(),
            _ => return Err(ctx.not_constant(1)),
        };
        let allow_zero = attr_int_checked(n, "allowzero")?.unwrap_or(0) != 0;
        let per_sample = per_sample_target(ctx, s, &target, allow_zero, self.fixed_batch)?;
        let total: usize = s.iter().product();
        let shape = resolve_minus_one(ctx, &per_sample, total)?;
        Ok((Op::Reshape { shape: per_sample }, shape, xn.clone()))
    }

    /// The `axes` of Squeeze or Unsqueeze: input 1 from opset 13, the attribute before.
    pub(super) fn squeeze_axes(
        &self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Option<Vec<i64>>, ImportError> {
        if self.opset >= 13 {
            Ok(ctx.constant(inputs, 1)?.map(|t| t.to_i64()))
        } else {
            attr_ints_checked(n, "axes")
        }
    }

    pub(super) fn squeeze(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let axes = self.squeeze_axes(n, ctx, inputs)?;
        let mut full: Vec<usize> = vec![0];
        full.extend_from_slice(s);
        let new_full: Vec<usize> = if n.op_type == "Squeeze" {
            let rank = full.len() as i64;
            let axes: Vec<usize> = match axes {
                Some(a) => a
                    .iter()
                    .map(|&x| (if x < 0 { x + rank } else { x }) as usize)
                    .collect(),
                None => {
                    return Err(ctx.unsupported(
                        "Squeeze without axes would also remove a batch of 1; name the axes",
                    ));
                }
            };
            if axes
                .iter()
                .any(|&a| a == 0 || a >= full.len() || full[a] != 1)
            {
                return Err(ctx.unsupported(format!(
                    "axes {axes:?} of [N, {s:?}]: only size-1 axes after the batch can be removed"
                )));
            }
            full.iter()
                .enumerate()
                .filter(|(i, _)| !axes.contains(i))
                .map(|(_, &d)| d)
                .collect()
        } else {
            let axes = axes.ok_or_else(|| ctx.unsupported("axes missing"))?;
            let rank = (full.len() + axes.len()) as i64;
            let mut axes: Vec<usize> = axes
                .iter()
                .map(|&x| (if x < 0 { x + rank } else { x }) as usize)
                .collect();
            axes.sort_unstable();
            if axes.first() == Some(&0) {
                return Err(ctx.unsupported("a new axis before the batch"));
            }
            let mut out = full.clone();
            for &a in &axes {
                if a > out.len() {
                    return Err(ctx.unsupported(format!("axis {a} out of range")));
                }
                out.insert(a, 1);
            }
            out
        };
        let per_sample: Vec<usize> = new_full[1..].to_vec();
        if per_sample.is_empty() || per_sample.len() > MAX_RANK {
            return Err(ctx.unsupported(format!(
                "result [N, {per_sample:?}] must have 1 to {MAX_RANK} dimensions after the batch"
            )));
        }
        let shape_i64 = per_sample.iter().map(|&d| d as i64).collect();
        Ok((Op::Reshape { shape: shape_i64 }, per_sample, xn.clone()))
    }

    pub(super) fn pad(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let mode = attr_string_checked(n, "mode")?.unwrap_or_else(|| "constant".into());
        if mode != "constant" {
            return Err(
                ctx.unsupported(format!("mode {mode:?}; only constant padding is supported"))
            );
        }
        if s.len() != 3 {
            return Err(ctx.unsupported(format!("input [N, {s:?}] is not [N, C, H, W]")));
        }
        let pads = match inputs.get(1) {
            Some(Some(Val::Const(t))) => t.to_i64(),
            _ => return Err(ctx.not_constant(1)),
        };
        let value = match inputs.get(2) {
            Some(Some(Val::Const(t))) if t.len() == 1 => t.to_f32()[0],
            None | Some(None) => 0.0,
            _ => return Err(ctx.unsupported("constant_value must be a constant scalar")),
        };
        // Opset 18 adds an `axes` input naming which axes `pads` covers.
        let axes: Vec<i64> = match inputs.get(3) {
            Some(Some(Val::Const(t))) => t
                .to_i64()
                .iter()
                .map(|&a| if a < 0 { a + 4 } else { a })
                .collect(),
            Some(Some(Val::Dyn { .. })) => return Err(ctx.not_constant(3)),
            _ => vec![0, 1, 2, 3],
        };
        if pads.len() != 2 * axes.len() {
            return Err(ctx.unsupported(format!("{} pads for {} axes", pads.len(), axes.len())));
        }
        let mut begin = [0i64; 4];
        let mut end = [0i64; 4];
        for (i, &a) in axes.iter().enumerate() {
            if !(0..4).contains(&a) {
                return Err(ctx.unsupported(format!("axis {a}")));
            }
            begin[a as usize] = pads[i];
            end[a as usize] = pads[i + axes.len()];
        }
        if begin[0] != 0 || end[0] != 0 {
            return Err(ctx.unsupported("padding of the batch axis"));
        }
        if begin
            .iter()
            .chain(&end)
            .any(|&p| !(0..=1 << 16).contains(&p))
        {
            return Err(ctx.unsupported(format!("pads {pads:?}: negative or absurd amounts")));
        }
        let padding = [
            begin[2] as usize,
            begin[3] as usize,
            end[2] as usize,
            end[3] as usize,
        ];
        let channels = [begin[1] as usize, end[1] as usize];
        let shape = vec![
            s[0] + channels[0] + channels[1],
            s[1] + padding[0] + padding[2],
            s[2] + padding[1] + padding[3],
        ];
        let op = Op::Pad {
            padding,
            value,
            channels,
        };
        Ok((op, shape, xn.clone()))
    }
}

impl Converter {
    /// Flatten at `axis`: 1 flattens everything after the batch; a later axis only when the
    /// axes between are all 1 (otherwise the batch mixes into the first axis), 0 never.
    pub(super) fn flatten(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let rank = s.len() as i64 + 1;
        let axis = attr_int_checked(n, "axis")?.unwrap_or(1);
        let axis = if axis < 0 { axis + rank } else { axis };
        if !(1..=rank).contains(&axis) {
            return Err(ctx.unsupported(format!(
                "axis {axis}: flattening must keep the batch axis apart"
            )));
        }
        let k = axis as usize - 1;
        if s[..k].iter().any(|&d| d != 1) {
            // [N, a, b, ...] flattened at a later axis is [N·a·..., ...]: samples would mix.
            return Err(ctx.unsupported(format!(
                "axis {axis} of [N, {s:?}] folds the batch into the first axis"
            )));
        }
        Ok((Op::Flatten, vec![s.iter().product()], xn.clone()))
    }

    /// Slice with constant starts, ends, axes and steps (ONNX's clamping rules). The batch
    /// axis may only be taken whole.
    pub(super) fn slice(
        &mut self,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let list = |i: usize| -> Result<Option<Vec<i64>>, ImportError> {
            Ok(ctx.constant(inputs, i)?.map(|t| t.to_i64()))
        };
        let starts = list(1)?.ok_or_else(|| ctx.not_constant(1))?;
        let ends = list(2)?.ok_or_else(|| ctx.not_constant(2))?;
        let axes = list(3)?.unwrap_or_else(|| (0..starts.len() as i64).collect());
        let steps = list(4)?.unwrap_or_else(|| vec![1; starts.len()]);
        if ends.len() != starts.len() || axes.len() != starts.len() || steps.len() != starts.len() {
            return Err(ctx.unsupported("starts, ends, axes and steps differ in length"));
        }
        let mut shape = s.clone();
        let mut ranges = Vec::new();
        for i in 0..starts.len() {
            let full = s.len() as i64 + 1;
            let a = if axes[i] < 0 { axes[i] + full } else { axes[i] };
            if a == 0 {
                // The batch: only "everything" is computable per sample.
                let whole = starts[i] == 0 && steps[i] == 1 && ends[i] >= BATCH;
                if !whole {
                    return Err(ctx.unsupported("a slice of the batch axis"));
                }
                continue;
            }
            let axis = ctx.sample_axis(axes[i], s.len())?;
            let r = axis_range(ctx, axis, s[axis], starts[i], ends[i], steps[i])?;
            if ranges.iter().any(|q: &AxisRange| q.axis == axis) {
                return Err(ctx.unsupported(format!("axis {} is sliced twice", axes[i])));
            }
            shape[axis] = r.count;
            ranges.push(r);
        }
        Ok((Op::Slice { ranges }, shape, xn.clone()))
    }

    /// Split: every output in use becomes a slice of its own.
    pub(super) fn split(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<(), ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let (xn, s) = (xn.clone(), s.clone());
        let axis = ctx.sample_axis(attr_int_checked(n, "axis")?.unwrap_or(0), s.len())?;
        let dim = s[axis];
        let parts = n.output.len();
        let sizes: Vec<i64> = match (ctx.constant(inputs, 1)?, attr_ints_checked(n, "split")?) {
            (Some(t), _) => t.to_i64(),
            (None, Some(v)) if self.opset < 13 => v,
            _ => {
                // Equal parts; with `num_outputs` (opset 18) the last may be smaller.
                let each = dim.div_ceil(parts.max(1)) as i64;
                (0..parts as i64)
                    .map(|i| each.min(dim as i64 - i * each).max(0))
                    .collect()
            }
        };
        if sizes.len() != parts
            || sizes.iter().any(|&v| v < 0)
            || sizes.iter().sum::<i64>() != dim as i64
        {
            return Err(ctx.unsupported(format!(
                "split sizes {sizes:?} into {parts} outputs do not add up to {dim}"
            )));
        }
        let mut start = 0usize;
        for (i, (o, &size)) in n.output.iter().zip(&sizes).enumerate() {
            let size = size as usize;
            if !o.is_empty() && self.uses.get(o).copied().unwrap_or(0) > 0 {
                if size == 0 {
                    return Err(ctx.unsupported(format!("output {i} is empty and in use")));
                }
                let mut shape = s.clone();
                shape[axis] = size;
                let range = AxisRange {
                    axis,
                    start,
                    step: 1,
                    count: size,
                };
                let part = if i == 0 {
                    name.to_string()
                } else {
                    format!("{name}:{i}")
                };
                self.push(
                    &part,
                    Op::Slice {
                        ranges: vec![range],
                    },
                    &[&xn],
                    o,
                    shape,
                );
            }
            start += size;
        }
        Ok(())
    }

    /// Gather with constant indices along an axis after the batch; the indices' shape
    /// replaces the axis (a scalar index removes it).
    pub(super) fn gather(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let (xn, s) = (xn.clone(), s.clone());
        let axis = ctx.sample_axis(attr_int_checked(n, "axis")?.unwrap_or(0), s.len())?;
        let idx = ctx
            .constant(inputs, 1)?
            .ok_or_else(|| ctx.not_constant(1))?;
        let dim = s[axis] as i64;
        let indices = idx
            .to_i64()
            .iter()
            .map(|&i| {
                let j = if i < 0 { i + dim } else { i };
                (0..dim).contains(&j).then_some(j as usize).ok_or_else(|| {
                    ctx.unsupported(format!("index {i} is out of range for size {dim}"))
                })
            })
            .collect::<Result<Vec<_>, _>>()?;
        let mut picked = s.clone();
        picked[axis] = indices.len();
        let mut shape: Vec<usize> = s[..axis].to_vec();
        shape.extend(&idx.shape);
        shape.extend(&s[axis + 1..]);
        if shape.is_empty() {
            // A scalar per sample is held as [1] (ONNX: [N] for the batch).
            shape.push(1);
        }
        if shape.is_empty() || shape.len() > MAX_RANK {
            return Err(ctx.unsupported(format!("result [N, {shape:?}] has an unsupported rank")));
        }
        if picked == shape {
            self.push(name, Op::Gather { axis, indices }, &[&xn], out, shape);
        } else {
            let mid = format!("{out}.picked");
            self.push(name, Op::Gather { axis, indices }, &[&xn], &mid, picked);
            let target = shape.iter().map(|&d| d as i64).collect();
            let reshape = format!("{name}.reshape");
            self.push(&reshape, Op::Reshape { shape: target }, &[&mid], out, shape);
        }
        Ok(())
    }

    /// Concat of one or more computed values along an axis after the batch.
    pub(super) fn concat(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let mut names = Vec::new();
        let mut shapes: Vec<Vec<usize>> = Vec::new();
        for (i, v) in inputs.iter().enumerate() {
            match v {
                Some(Val::Dyn { name, shape }) => {
                    names.push(name.clone());
                    shapes.push(shape.clone());
                }
                _ => {
                    return Err(ctx.unsupported(format!(
                        "input {i} is a constant; only computed values can be joined"
                    )));
                }
            }
        }
        let axis = ctx.sample_axis(attr_int_checked(n, "axis")?.unwrap_or(1), shapes[0].len())?;
        let mut shape = shapes[0].clone();
        for s in &shapes {
            let fits =
                s.len() == shape.len() && (0..s.len()).all(|d| d == axis || s[d] == shape[d]);
            if !fits {
                return Err(ctx.unsupported(format!(
                    "[N, {s:?}] does not match [N, {:?}] apart from axis {}",
                    shapes[0],
                    axis + 1
                )));
            }
        }
        shape[axis] = shapes.iter().map(|s| s[axis]).sum();
        let refs: Vec<&str> = names.iter().map(String::as_str).collect();
        self.push(name, Op::Concat { axis }, &refs, out, shape);
        Ok(())
    }

    /// Expand to a constant shape (numpy broadcasting); the batch entry must be 1 or the
    /// batch itself.
    pub(super) fn expand(
        &mut self,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let target = ctx
            .constant(inputs, 1)?
            .ok_or_else(|| ctx.not_constant(1))?
            .to_i64();
        if target.len() > s.len() + 1 {
            return Err(ctx.unsupported(format!("target {target:?} adds axes before the batch")));
        }
        let mut full = vec![1i64; s.len() + 1 - target.len()];
        full.extend(&target);
        if !(full[0] == 1 || full[0] == BATCH || Some(full[0]) == self.fixed_batch) {
            return Err(ctx.unsupported(format!("target {target:?} changes the batch")));
        }
        let mut shape = Vec::with_capacity(s.len());
        for (&d, &t) in s.iter().zip(&full[1..]) {
            shape.push(match t {
                t if t == d as i64 || t == 1 => d,
                t if d == 1 && (1..=1 << 24).contains(&t) => t as usize,
                _ => return Err(ctx.unsupported(format!("[N, {s:?}] cannot expand to {target:?}"))),
            });
        }
        let op = if shape == *s {
            Op::Identity
        } else {
            Op::Expand {
                shape: shape.clone(),
            }
        };
        Ok((op, shape, xn.clone()))
    }

    pub(super) fn tile(
        &mut self,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let repeats = ctx
            .constant(inputs, 1)?
            .ok_or_else(|| ctx.not_constant(1))?
            .to_i64();
        if repeats.len() != s.len() + 1 || repeats[0] != 1 {
            return Err(ctx.unsupported(format!(
                "repeats {repeats:?}: need one per axis, 1 for the batch"
            )));
        }
        if repeats.iter().any(|&r| !(1..=1 << 16).contains(&r)) {
            return Err(ctx.unsupported(format!("repeats {repeats:?} must be 1 to 65536")));
        }
        let repeats: Vec<usize> = repeats[1..].iter().map(|&r| r as usize).collect();
        let shape = s.iter().zip(&repeats).map(|(&d, &r)| d * r).collect();
        Ok((Op::Tile { repeats }, shape, xn.clone()))
    }
}

/// One axis of an ONNX `Slice`, clamped as the operator specification says: negative
/// starts and ends count from the end, then starts and ends are clamped to `[0, dim]`
/// (`[0, dim - 1]` and `[-1, dim - 1]` for negative steps).
fn axis_range(
    ctx: &Ctx<'_>,
    axis: usize,
    dim: usize,
    start: i64,
    end: i64,
    step: i64,
) -> Result<AxisRange, ImportError> {
    if step == 0 {
        return Err(ctx.unsupported("a step of 0"));
    }
    let d = dim as i128;
    let norm = |v: i64| {
        if v < 0 {
            i128::from(v) + d
        } else {
            i128::from(v)
        }
    };
    let (lo, hi) = if step > 0 { (0, d) } else { (-1, d - 1) };
    let first = norm(start).clamp(0, if step > 0 { d } else { d - 1 });
    let last = norm(end).clamp(lo, hi);
    let step_i = i128::from(step);
    let span = last - first;
    let count = if (span > 0) == (step > 0) && span != 0 {
        (span.abs() + step_i.abs() - 1) / step_i.abs()
    } else {
        0
    };
    if count == 0 {
        return Err(ctx.unsupported(format!(
            "the slice {start}..{end} step {step} of an axis of size {dim} is empty"
        )));
    }
    Ok(AxisRange {
        axis,
        start: first as usize,
        step,
        count: count as usize,
    })
}

/// A `Reshape` target for `[N, ...s]`, with the batch removed: the first entry must keep the
/// batch (the [`BATCH`] sentinel, `0` = copy, or `-1` when the rest accounts for every
/// element); the rest is the per-sample shape (`0` copies the input's dimension).
fn per_sample_target(
    ctx: &Ctx<'_>,
    s: &[usize],
    target: &[i64],
    allow_zero: bool,
    fixed_batch: Option<i64>,
) -> Result<Vec<i64>, ImportError> {
    if target.is_empty() {
        return Err(ctx.unsupported("empty target shape"));
    }
    let total: usize = s.iter().product();
    let rest = &target[1..];
    if rest.contains(&BATCH) {
        return Err(
            ctx.unsupported("the target shape moves the batch size away from the first axis")
        );
    }
    let mut out = Vec::with_capacity(rest.len());
    for (i, &d) in rest.iter().enumerate() {
        let d = if d == 0 && !allow_zero {
            match s.get(i) {
                Some(&v) => v as i64,
                None => return Err(ctx.unsupported("0 (copy) beyond the input's rank")),
            }
        } else {
            d
        };
        if d < -1 || d == 0 {
            return Err(ctx.unsupported(format!("target shape {target:?}")));
        }
        out.push(d);
    }
    match target[0] {
        BATCH => {}
        0 if !allow_zero => {}
        d if Some(d) == fixed_batch => {}
        -1 => {
            if out.contains(&-1) {
                return Err(ctx.unsupported(format!(
                    "target {target:?} has two unknown sizes; the batch must be the first"
                )));
            }
            let known: i64 = out.iter().product();
            if known as usize != total {
                return Err(ctx.unsupported(format!(
                    "target {target:?} would mix samples of a batch ([N, {s:?}] has {total} values per sample)"
                )));
            }
        }
        d => {
            return Err(ctx.unsupported(match fixed_batch {
                Some(b) if b > 1 => format!(
                    "target {target:?} mixes the input's fixed batch of {b} into other axes; \
                     the bundle must compute each sample alone"
                ),
                _ => format!(
                    "target {target:?} fixes the batch at {d}; the bundle must work for any batch"
                ),
            }));
        }
    }
    if out.is_empty() || out.len() > MAX_RANK {
        return Err(ctx.unsupported(format!(
            "target {target:?}: 1 to {MAX_RANK} dimensions after the batch are supported"
        )));
    }
    Ok(out)
}

fn resolve_minus_one(
    ctx: &Ctx<'_>,
    target: &[i64],
    total: usize,
) -> Result<Vec<usize>, ImportError> {
    let known: i64 = target.iter().filter(|&&d| d != -1).product();
    let mut out = Vec::with_capacity(target.len());
    for &d in target {
        if d == -1 {
            if known <= 0 || !total.is_multiple_of(known as usize) {
                return Err(ctx.unsupported(format!("{target:?} does not divide {total} values")));
            }
            out.push(total / known as usize);
        } else {
            out.push(d as usize);
        }
    }
    if out.iter().product::<usize>() != total {
        return Err(ctx.unsupported(format!("{target:?} does not hold {total} values")));
    }
    Ok(out)
}
