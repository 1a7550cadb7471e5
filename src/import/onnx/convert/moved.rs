//! Values whose batch axis an exporter moved away from the front for a moment.
//!
//! The dynamo exporter writes an adaptive average pool that enlarges (AlexNet's 6×6 pool
//! on a smaller map) as `Transpose [2, 3, 0, 1]` (positions first, batch third) → `GatherND`
//! of the positions → `Transpose` that brings the batch back. convoy computes every sample
//! alone, so such a value is kept as [`Val::Moved`]: the batch-first value we hold and the
//! permutation the ONNX value is of it. Transposes compose into it; a `GatherND` that picks
//! only positions after the batch becomes a per-sample `Gather` on the picked axes merged
//! into one; the first transpose that puts the batch back in front turns it into a normal
//! computed value again. Any other reader of a moved value is refused (`Converter::node`).

use super::{Converter, Ctx, Val};
use crate::graph::Op;
use crate::graph::shapes::MAX_RANK;
use crate::import::ImportError;
use crate::import::onnx::attr::{attr_int_checked, attr_ints_checked};
use crate::import::onnx::proto::onnx::NodeProto;

/// Ops that compute each element from the same element alone (constant parameters are
/// scalars or attributes), so they commute with any permutation of the axes.
const ELEMENT_WISE: &[&str] = &[
    "Relu",
    "LeakyRelu",
    "Sigmoid",
    "Tanh",
    "HardSigmoid",
    "HardSwish",
    "Gelu",
    "Clip",
    "Sqrt",
    "Reciprocal",
    "Abs",
    "Neg",
    "Exp",
    "Log",
    "Erf",
    "Identity",
    "Dropout",
];

/// A computed value as an op sees it: the batch-first value we hold, its per-sample shape,
/// and the permutation of `[batch, per-sample axes…]` the ONNX value is (identity when the
/// batch is in front).
struct Held {
    name: String,
    shape: Vec<usize>,
    perm: Vec<usize>,
}

impl Held {
    fn of(ctx: &Ctx<'_>, inputs: &[Option<Val>]) -> Result<Held, ImportError> {
        match inputs.first() {
            Some(Some(Val::Dyn { name, shape })) => Ok(Held {
                name: name.clone(),
                shape: shape.clone(),
                perm: (0..=shape.len()).collect(),
            }),
            Some(Some(Val::Moved { name, shape, perm })) => Ok(Held {
                name: name.clone(),
                shape: shape.clone(),
                perm: perm.clone(),
            }),
            _ => Err(ctx.unsupported("its first input must be the computed value, not a constant")),
        }
    }

    /// Size of axis `a` of the held (batch-first) value; `None` for the batch.
    fn dim(&self, a: usize) -> Option<usize> {
        (a > 0).then(|| self.shape[a - 1])
    }
}

impl Converter {
    /// Transpose: composed into the value's permutation; computed as a per-sample transpose
    /// once the batch is back in front.
    pub(super) fn transpose(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let held = Held::of(ctx, inputs)?;
        let rank = held.perm.len();
        let perm =
            attr_ints_checked(n, "perm")?.unwrap_or_else(|| (0..rank as i64).rev().collect());
        let mut seen = vec![false; rank];
        let valid = perm.len() == rank
            && perm.iter().all(|&p| {
                (0..rank as i64).contains(&p) && !std::mem::replace(&mut seen[p as usize], true)
            });
        if !valid {
            return Err(
                ctx.unsupported(format!("perm {perm:?} is not a permutation of {rank} axes"))
            );
        }
        let composed = perm.iter().map(|&p| held.perm[p as usize]).collect();
        self.place(name, held.name, held.shape, composed, out);
        Ok(())
    }

    /// GatherND (`batch_dims` 0) with constant indices on a value whose batch was moved
    /// behind the picked axes: a per-sample Gather of the picked positions.
    pub(super) fn gather_nd(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let held = Held::of(ctx, inputs)?;
        if attr_int_checked(n, "batch_dims")?.unwrap_or(0) != 0 {
            return Err(ctx.unsupported("batch_dims other than 0 is not supported"));
        }
        let idx = ctx
            .constant(inputs, 1)?
            .ok_or_else(|| ctx.not_constant(1))?;
        let k = idx.shape.last().copied().unwrap_or(0);
        let picked = &held.perm[..k.min(held.perm.len())];
        if k == 0 || k >= held.perm.len() || picked.contains(&0) {
            return Err(ctx.unsupported(format!(
                "the indices pick the first {k} axes, which must all lie after the batch axis (a transpose can move the batch behind them)"
            )));
        }
        let kept: Vec<usize> = held.perm[k..].iter().copied().filter(|&a| a != 0).collect();
        // Held value reordered to [batch, kept…, picked…], picked axes merged into one.
        let order: Vec<usize> = std::iter::once(0)
            .chain(kept.iter().copied())
            .chain(picked.iter().copied())
            .collect();
        let dims =
            |axes: &[usize]| -> Vec<usize> { axes.iter().filter_map(|&a| held.dim(a)).collect() };
        let picked_dims = dims(picked);
        let positions: usize = picked_dims.iter().product();
        let linear = linear_positions(ctx, &idx.to_i64(), &picked_dims)?;
        let lead = &idx.shape[..idx.shape.len() - 1];
        let mut merged = dims(&kept);
        merged.push(positions);
        let mut gathered = dims(&kept);
        gathered.extend(lead);
        if gathered.is_empty() || gathered.len() > MAX_RANK {
            return Err(ctx.unsupported(format!(
                "result [N, {gathered:?}] must have 1 to {MAX_RANK} dimensions after the batch"
            )));
        }
        let ordered = self.reorder(
            &format!("{name}.reorder"),
            &held.name,
            &held.shape,
            &order,
            &format!("{out}.ordered"),
        );
        let flat = format!("{out}.positions");
        let target = merged.iter().map(|&d| d as i64).collect();
        self.push(
            &format!("{name}.merge"),
            Op::Reshape { shape: target },
            &[&ordered],
            &flat,
            merged,
        );
        let axis = kept.len();
        let mut picked_shape = dims(&kept);
        picked_shape.push(linear.len());
        let at = format!("{out}.picked");
        let op = Op::Gather {
            axis,
            indices: linear,
        };
        self.push(name, op, &[&flat], &at, picked_shape);
        let target = gathered.iter().map(|&d| d as i64).collect();
        let split = format!("{out}.gathered");
        let op = Op::Reshape { shape: target };
        self.push(
            &format!("{name}.split"),
            op,
            &[&at],
            &split,
            gathered.clone(),
        );
        // The ONNX result is [lead…, rest of the held permutation…]; ours is
        // [batch, kept…, lead…].
        let perm = (0..lead.len())
            .map(|i| 1 + kept.len() + i)
            .chain(held.perm[k..].iter().map(|&a| {
                if a == 0 {
                    0
                } else {
                    1 + kept.iter().position(|&b| b == a).unwrap_or(0)
                }
            }))
            .collect();
        self.place(&format!("{name}.order"), split, gathered, perm, out);
        Ok(())
    }

    /// A node reading a value whose batch is moved: Transpose and GatherND work on the
    /// permutation; an element-wise op of one input works on the held value and keeps the
    /// permutation; anything else is refused.
    pub(super) fn moved_input(
        &mut self,
        n: &NodeProto,
        name: &str,
        inputs: &[Option<Val>],
        at: usize,
    ) -> Result<(), ImportError> {
        let (ctx, out) = Ctx::of(n, name);
        match n.op_type.as_str() {
            "Transpose" => return self.transpose(n, name, &ctx, inputs, &out),
            "GatherND" => return self.gather_nd(n, name, &ctx, inputs, &out),
            _ => {}
        }
        let computed = |i: &Option<Val>| matches!(i, Some(Val::Dyn { .. } | Val::Moved { .. }));
        let one_input = at == 0 && !inputs.iter().skip(1).any(computed);
        if !(one_input && ELEMENT_WISE.contains(&n.op_type.as_str())) {
            return Err(ctx.unsupported(format!(
                "input {:?} has its batch axis moved by an earlier Transpose; only Transpose, GatherND and element-wise ops of one value may read it until a Transpose puts the batch first again",
                n.input[at]
            )));
        }
        let Some(Some(Val::Moved {
            name: held,
            shape,
            perm,
        })) = inputs.first()
        else {
            return Err(ctx.unsupported("its first input must be the computed value"));
        };
        let mut batch_first = inputs.to_vec();
        batch_first[0] = Some(Val::Dyn {
            name: held.clone(),
            shape: shape.clone(),
        });
        self.dynamic(n, name, &batch_first)?;
        if let Some(Val::Dyn {
            name: result,
            shape,
        }) = self.vals.get(&out).cloned()
        {
            self.set(
                &out,
                Val::Moved {
                    name: result,
                    shape,
                    perm: perm.clone(),
                },
            );
        }
        Ok(())
    }

    /// Records ONNX value `out` as the permutation `perm` of held value `held`: computed now
    /// when the batch is in front, kept as moved otherwise.
    fn place(&mut self, name: &str, held: String, shape: Vec<usize>, perm: Vec<usize>, out: &str) {
        if perm[0] == 0 {
            self.reorder(name, &held, &shape, &perm, out);
        } else {
            self.set(
                out,
                Val::Moved {
                    name: held,
                    shape,
                    perm,
                },
            );
        }
    }

    /// Pushes a batch-keeping transpose of `input` by `perm` (an alias when it is the
    /// identity) producing `out`; returns `out`.
    fn reorder(
        &mut self,
        name: &str,
        input: &str,
        shape: &[usize],
        perm: &[usize],
        out: &str,
    ) -> String {
        let sample: Vec<usize> = perm[1..].iter().map(|&p| p - 1).collect();
        let result = sample.iter().map(|&p| shape[p]).collect();
        let op = if sample.iter().enumerate().all(|(i, &p)| i == p) {
            Op::Identity
        } else {
            Op::Transpose { perm: sample }
        };
        self.push(name, op, &[input], out, result);
        out.to_string()
    }
}

/// Rows of `dims.len()` indices (negative ones counted from the end) as row-major positions
/// in a block of shape `dims`.
fn linear_positions(
    ctx: &Ctx<'_>,
    rows: &[i64],
    dims: &[usize],
) -> Result<Vec<usize>, ImportError> {
    rows.chunks(dims.len())
        .map(|row| {
            row.iter().zip(dims).try_fold(0usize, |at, (&i, &d)| {
                let j = if i < 0 { i + d as i64 } else { i };
                if !(0..d as i64).contains(&j) {
                    return Err(ctx.unsupported(format!("index {i} is out of range for size {d}")));
                }
                Ok(at * d + j as usize)
            })
        })
        .collect()
}
