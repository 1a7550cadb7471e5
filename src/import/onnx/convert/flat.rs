//! Indexing into the whole batch flattened, as the dynamo exporter writes `as_strided`.
//!
//! A permute of a pooled `[N, C, 1, 1]` value comes out of the dynamo exporter as
//! `Reshape(x, [-1])` (every sample's values in one axis) and a `Gather` on it whose indices
//! are computed from the batch size: `Range(0, N, 1) · S`, unsqueezed, plus constant offsets.
//! Sample `n` then reads only its own slice `[n·S, (n+1)·S)` whenever the stride `S` is the
//! sample's size and every offset lies inside it — a per-sample Gather of the offsets.
//!
//! Two kinds of values carry this: [`Val::Flat`], a computed value seen with the batch
//! flattened into its one axis, and [`Val::Ramp`], an integer tensor whose entry
//! `[n, rest…]` is `n · step + offset[rest…]`. Ramps come from `Range(0, N, 1)` and go
//! through `Mul` by a constant integer, `Unsqueeze` after the batch and `Add` of a constant;
//! a `Gather` on axis 0 of a flat value with such indices becomes a per-sample gather. With
//! a fixed batch the exporter writes the indices as a constant; those are accepted when they
//! have the same form. Anything else that reads a flat value or a ramp is refused by name.

use ndarray::{ArrayD, IxDyn};

use super::{BATCH, Converter, Ctx, Val};
use crate::graph::Op;
use crate::graph::shapes::MAX_RANK;
use crate::import::ImportError;
use crate::import::onnx::attr::attr_int_checked;
use crate::import::onnx::proto::onnx::NodeProto;
use crate::import::onnx::tensor::{ConstData, ConstTensor};

impl Converter {
    /// Whether node `n` makes or reads a flat value or a ramp (then [`Self::batch_indexing`]
    /// converts it).
    pub(super) fn is_batch_indexing(&self, n: &NodeProto, inputs: &[Option<Val>]) -> bool {
        let reads = inputs
            .iter()
            .any(|i| matches!(i, Some(Val::Flat { .. } | Val::Ramp { .. })));
        let ints = |i: usize| match inputs.get(i) {
            Some(Some(Val::Const(t))) if t.len() == 1 && !t.is_float() => Some(t.to_i64()[0]),
            _ => None,
        };
        let batch_range = n.op_type == "Range" && ints(1) == Some(BATCH);
        let whole_batch_reshape = n.op_type == "Reshape"
            && matches!(inputs.first(), Some(Some(Val::Dyn { .. })))
            && matches!(inputs.get(1), Some(Some(Val::Const(t))) if t.shape == [1] && t.to_i64() == [-1]);
        reads || batch_range || whole_batch_reshape
    }

    pub(super) fn batch_indexing(
        &mut self,
        n: &NodeProto,
        name: &str,
        inputs: &[Option<Val>],
    ) -> Result<(), ImportError> {
        let (ctx, out) = Ctx::of(n, name);
        let val = match (n.op_type.as_str(), inputs) {
            ("Reshape", [Some(Val::Dyn { name, shape }), Some(Val::Const(_))]) => Val::Flat {
                name: name.clone(),
                shape: shape.clone(),
            },
            (
                "Range",
                [
                    Some(Val::Const(start)),
                    Some(Val::Const(_)),
                    Some(Val::Const(delta)),
                ],
            ) => {
                if start.to_i64() != [0] || delta.to_i64() != [1] || start.is_float() {
                    return Err(ctx.unsupported(
                        "a range over the batch size is supported only as Range(0, N, 1)",
                    ));
                }
                Val::Ramp {
                    step: 1,
                    offset: ConstTensor::i64(Vec::new(), vec![0]),
                }
            }
            ("Mul", [Some(Val::Ramp { step, offset }), Some(Val::Const(c))])
            | ("Mul", [Some(Val::Const(c)), Some(Val::Ramp { step, offset })]) => {
                let k = scalar_int(&ctx, c)?;
                let data = offset.to_i64().iter().map(|v| v * k).collect();
                Val::Ramp {
                    step: step * k,
                    offset: ConstTensor::i64(offset.shape.clone(), data),
                }
            }
            ("Add", [Some(Val::Ramp { step, offset }), Some(Val::Const(c))])
            | ("Add", [Some(Val::Const(c)), Some(Val::Ramp { step, offset })]) => Val::Ramp {
                step: *step,
                offset: add_offsets(&ctx, offset, c)?,
            },
            ("Unsqueeze", [Some(Val::Ramp { step, offset }), ..]) => Val::Ramp {
                step: *step,
                offset: self.unsqueeze_offsets(n, &ctx, offset, inputs)?,
            },
            ("Gather", [Some(Val::Flat { name, shape }), Some(indices)]) => {
                if attr_int_checked(n, "axis")?.unwrap_or(0) != 0 {
                    return Err(ctx.unsupported("a flattened batch is gathered only on axis 0"));
                }
                let (name, shape) = (name.clone(), shape.clone());
                return self.gather_own_slices(&ctx, &name, &shape, indices, &out);
            }
            _ => {
                return Err(ctx.unsupported(
                    "it reads values that index the whole batch at once (a reshape of every sample into one axis, or a range over the batch size); only Gather of each sample's own slice is supported",
                ));
            }
        };
        self.set(&out, val);
        Ok(())
    }

    fn unsqueeze_offsets(
        &self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        offset: &ConstTensor,
        inputs: &[Option<Val>],
    ) -> Result<ConstTensor, ImportError> {
        let axes = self
            .squeeze_axes(n, ctx, inputs)?
            .ok_or_else(|| ctx.unsupported("Unsqueeze of a range over the batch needs axes"))?;
        let rank = offset.shape.len() + 1 + axes.len();
        let mut axes: Vec<usize> = axes
            .iter()
            .map(|&a| if a < 0 { a + rank as i64 } else { a })
            .map(|a| usize::try_from(a).unwrap_or(usize::MAX))
            .collect();
        axes.sort_unstable();
        if axes.iter().any(|&a| a == 0 || a >= rank) || axes.windows(2).any(|w| w[0] == w[1]) {
            return Err(
                ctx.unsupported("a range over the batch is unsqueezed only after the batch")
            );
        }
        let mut shape = offset.shape.clone();
        for a in axes {
            shape.insert(a - 1, 1);
        }
        Ok(ConstTensor::i64(shape, offset.to_i64()))
    }

    /// `Gather(flat, indices)` where sample `n` reads `n · S + offset` (`S` the sample's
    /// size, every offset in `[0, S)`): a per-sample gather of the offsets.
    fn gather_own_slices(
        &mut self,
        ctx: &Ctx<'_>,
        held: &str,
        shape: &[usize],
        indices: &Val,
        out: &str,
    ) -> Result<(), ImportError> {
        let size: usize = shape.iter().product();
        let (step, offset) = match indices {
            Val::Ramp { step, offset } => (*step, offset.clone()),
            Val::Const(c) if !c.is_float() => self.fixed_batch_ramp(ctx, c, size)?,
            _ => {
                return Err(
                    ctx.unsupported("the indices into the flattened batch are not a range over it")
                );
            }
        };
        if step != size as i64 {
            return Err(ctx.unsupported(format!(
                "sample n reads from n·{step}, not from its own {size} values"
            )));
        }
        let offsets = offset.to_i64();
        let picked = offsets
            .iter()
            .map(|&o| usize::try_from(o).ok().filter(|&o| o < size))
            .collect::<Option<Vec<usize>>>()
            .ok_or_else(|| ctx.unsupported("an index reaches outside its own sample's values"))?;
        let mut result = offset.shape.clone();
        if result.is_empty() {
            result.push(1);
        }
        if result.len() > MAX_RANK {
            return Err(ctx.unsupported(format!("result [N, {result:?}] has an unsupported rank")));
        }
        let node = ctx.node;
        let flat = format!("{out}.sample");
        let target = vec![size as i64];
        self.push(
            &format!("{node}.flatten"),
            Op::Reshape { shape: target },
            &[held],
            &flat,
            vec![size],
        );
        let at = format!("{out}.picked");
        let count = picked.len();
        self.push(
            node,
            Op::Gather {
                axis: 0,
                indices: picked,
            },
            &[&flat],
            &at,
            vec![count],
        );
        let target = result.iter().map(|&d| d as i64).collect();
        self.push(
            &format!("{node}.reshape"),
            Op::Reshape { shape: target },
            &[&at],
            out,
            result,
        );
        Ok(())
    }

    /// Constant indices `[N, rest…]` of a fixed-batch export, as a ramp when row `n` is row
    /// 0 plus `n · size`.
    fn fixed_batch_ramp(
        &self,
        ctx: &Ctx<'_>,
        c: &ConstTensor,
        size: usize,
    ) -> Result<(i64, ConstTensor), ImportError> {
        let batch = self.fixed_batch.unwrap_or(0);
        let not_ramp = || {
            ctx.unsupported(
                "constant indices into the flattened batch do not pick each sample's own values",
            )
        };
        if c.shape.first().map(|&d| d as i64) != Some(batch) {
            return Err(not_ramp());
        }
        let v = c.to_i64();
        let row = v.len() / batch as usize;
        let ramp = v.chunks(row).enumerate().all(|(k, r)| {
            r.iter()
                .zip(&v[..row])
                .all(|(a, b)| *a == b + k as i64 * size as i64)
        });
        if !ramp {
            return Err(not_ramp());
        }
        Ok((
            size as i64,
            ConstTensor::i64(c.shape[1..].to_vec(), v[..row].to_vec()),
        ))
    }
}

fn scalar_int(ctx: &Ctx<'_>, c: &ConstTensor) -> Result<i64, ImportError> {
    match &c.data {
        ConstData::I64(v) if v.len() == 1 => Ok(v[0]),
        _ => Err(ctx.unsupported("a range over the batch is multiplied only by one integer")),
    }
}

/// `offset + c` by ONNX broadcasting, where the ramp's value has the batch axis in front of
/// `offset`'s axes: `c` may reach that axis only with size 1.
fn add_offsets(
    ctx: &Ctx<'_>,
    offset: &ConstTensor,
    c: &ConstTensor,
) -> Result<ConstTensor, ImportError> {
    let ConstData::I64(cv) = &c.data else {
        return Err(ctx.unsupported("a range over the batch is added to integers only"));
    };
    let r = offset.shape.len();
    let mut cshape = c.shape.clone();
    if cshape.len() == r + 1 && cshape[0] == 1 {
        cshape.remove(0);
    }
    let problem = || {
        ctx.unsupported(format!(
            "a constant of shape {:?} does not broadcast along a range over the batch",
            c.shape
        ))
    };
    if cshape.len() > r {
        return Err(problem());
    }
    let a = ArrayD::from_shape_vec(IxDyn(&offset.shape), offset.to_i64()).map_err(|_| problem())?;
    let b = ArrayD::from_shape_vec(IxDyn(&cshape), cv.clone()).map_err(|_| problem())?;
    let pad = r - cshape.len();
    let mut shape = offset.shape.clone();
    for (i, &d) in cshape.iter().enumerate() {
        let s = &mut shape[pad + i];
        if *s == 1 {
            *s = d;
        } else if d != 1 && d != *s {
            return Err(problem());
        }
    }
    let (a, b) = (a.broadcast(shape.clone()), b.broadcast(shape));
    let (Some(a), Some(b)) = (a, b) else {
        return Err(problem());
    };
    let sum = &a + &b;
    Ok(ConstTensor::i64(
        sum.shape().to_vec(),
        sum.iter().copied().collect(),
    ))
}
