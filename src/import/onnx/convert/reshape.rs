//! Ops that only move or reshape data: Reshape, Squeeze/Unsqueeze, Pad — and the batch
//! bookkeeping that reshape targets need.

use super::{BATCH, Converter, Ctx, Val};
use crate::graph::Op;
use crate::import::ImportError;
use crate::import::onnx::attr::{attr_int_checked, attr_ints_checked, attr_string_checked};
use crate::import::onnx::proto::onnx::NodeProto;

impl Converter {
    pub(super) fn reshape(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<(Op, Vec<usize>, String), ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let target = match inputs.get(1) {
            Some(Some(Val::Const(t))) => t.to_i64(),
            _ => return Err(ctx.not_constant(1)),
        };
        let allow_zero = attr_int_checked(n, "allowzero")?.unwrap_or(0) != 0;
        let per_sample = per_sample_target(ctx, s, &target, allow_zero)?;
        let total: usize = s.iter().product();
        let shape = resolve_minus_one(ctx, &per_sample, total)?;
        Ok((Op::Reshape { shape: per_sample }, shape, xn.clone()))
    }

    pub(super) fn squeeze(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<(Op, Vec<usize>, String), ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let axes = if self.opset >= 13 {
            match inputs.get(1) {
                Some(Some(Val::Const(t))) => Some(t.to_i64()),
                Some(Some(Val::Dyn { .. })) => return Err(ctx.not_constant(1)),
                _ => None,
            }
        } else {
            attr_ints_checked(n, "axes")?
        };
        let mut full: Vec<usize> = vec![0];
        full.extend_from_slice(s);
        let new_full: Vec<usize> = if n.op_type == "Squeeze" {
            let rank = full.len() as i64;
            let axes: Vec<usize> = match axes {
                Some(a) => a
                    .iter()
                    .map(|&x| (if x < 0 { x + rank } else { x }) as usize)
                    .collect(),
                None => (1..full.len()).filter(|&i| full[i] == 1).collect(),
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
        if per_sample.is_empty() || per_sample.len() > 3 {
            return Err(ctx.unsupported(format!(
                "result [N, {per_sample:?}] must have 1 to 3 dimensions after the batch"
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
    ) -> Result<(Op, Vec<usize>, String), ImportError> {
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
        if begin[..2].iter().chain(&end[..2]).any(|&p| p != 0) {
            return Err(ctx.unsupported("padding of the batch or channel axes"));
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
        let shape = vec![
            s[0],
            s[1] + padding[0] + padding[2],
            s[2] + padding[1] + padding[3],
        ];
        Ok((Op::Pad { padding, value }, shape, xn.clone()))
    }
}

/// A `Reshape` target for `[N, ...s]`, with the batch removed: the first entry must keep the
/// batch (the [`BATCH`] sentinel, `0` = copy, or `-1` when the rest accounts for every
/// element); the rest is the per-sample shape (`0` copies the input's dimension).
fn per_sample_target(
    ctx: &Ctx<'_>,
    s: &[usize],
    target: &[i64],
    allow_zero: bool,
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
            return Err(ctx.unsupported(format!(
                "target {target:?} fixes the batch at {d}; the bundle must work for any batch"
            )));
        }
    }
    if out.is_empty() || out.len() > 3 {
        return Err(ctx.unsupported(format!(
            "target {target:?}: 1 to 3 dimensions after the batch are supported"
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
