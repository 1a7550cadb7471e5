//! Shapes of the ops that move, pick, repeat, join or summarise data: reshape, concat,
//! transpose, slice, gather, expand, tile, reduce, layer norm.

use super::{Ctx, GraphError, MAX_RANK};
use crate::graph::AxisRange;

impl Ctx<'_> {
    pub(super) fn reshape(&self, x: &[usize], target: &[i64]) -> Result<Vec<usize>, GraphError> {
        let total: usize = x.iter().product();
        if target.is_empty() || target.len() > MAX_RANK {
            return Err(self.bad_param(
                "shape",
                format!("{target:?} must have 1 to {MAX_RANK} entries"),
            ));
        }
        let mut known = 1usize;
        let mut free = None;
        for (i, &d) in target.iter().enumerate() {
            match d {
                -1 if free.is_none() => free = Some(i),
                d if d >= 1 => {
                    known = known
                        .checked_mul(d as usize)
                        .ok_or_else(|| self.bad_param("shape", format!("{target:?} overflows")))?;
                }
                _ => {
                    return Err(self.bad_param(
                        "shape",
                        format!("{target:?}: entries must be ≥ 1, with at most one -1"),
                    ));
                }
            }
        }
        let mut out: Vec<usize> = target.iter().map(|&d| d.max(0) as usize).collect();
        if let Some(i) = free {
            if !total.is_multiple_of(known) {
                return Err(
                    self.input_shape(x, format!("a size divisible by {known} for {target:?}"))
                );
            }
            out[i] = total / known;
        } else if known != total {
            return Err(self.input_shape(x, format!("{known} elements for {target:?}")));
        }
        Ok(out)
    }

    pub(super) fn concat(&self, axis: usize, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        self.arity(ins, "at least 1", !ins.is_empty())?;
        let first = &ins[0];
        if axis >= first.len() {
            return Err(self.bad_param("axis", format!("{axis} is past the rank of {first:?}")));
        }
        let mut total = 0usize;
        for x in ins {
            let same_rest = x.len() == first.len()
                && x.iter()
                    .zip(first)
                    .enumerate()
                    .all(|(i, (a, b))| i == axis || a == b);
            if !same_rest {
                return Err(self.input_shape(
                    x,
                    format!("the same shape as {first:?} apart from axis {axis}"),
                ));
            }
            total = total
                .checked_add(x[axis])
                .ok_or_else(|| self.bad_param("axis", "joined size overflows"))?;
        }
        let mut out = first.clone();
        out[axis] = total;
        Ok(out)
    }

    pub(super) fn transpose(&self, x: &[usize], perm: &[usize]) -> Result<Vec<usize>, GraphError> {
        let mut seen = vec![false; x.len()];
        let valid = perm.len() == x.len()
            && perm
                .iter()
                .all(|&p| p < x.len() && !std::mem::replace(&mut seen[p], true));
        if !valid {
            return Err(self.bad_param(
                "perm",
                format!(
                    "{perm:?} is not a permutation of the {} axes of {x:?}",
                    x.len()
                ),
            ));
        }
        Ok(perm.iter().map(|&p| x[p]).collect())
    }

    pub(super) fn slice(
        &self,
        x: &[usize],
        ranges: &[AxisRange],
    ) -> Result<Vec<usize>, GraphError> {
        let mut out = x.to_vec();
        let mut seen = vec![false; x.len()];
        for r in ranges {
            let bad = |reason: String| self.bad_param("ranges", reason);
            if r.axis >= x.len() || std::mem::replace(&mut seen[r.axis], true) {
                return Err(bad(format!("axis {} is out of range or repeated", r.axis)));
            }
            let dim = x[r.axis] as i128;
            let last = r.start as i128 + (r.count as i128 - 1) * i128::from(r.step);
            let fits =
                r.count >= 1 && r.step != 0 && (r.start as i128) < dim && (0..dim).contains(&last);
            if !fits {
                return Err(bad(format!(
                    "{} elements from {} in steps of {} do not fit axis {} of size {dim}",
                    r.count, r.start, r.step, r.axis
                )));
            }
            out[r.axis] = r.count;
        }
        Ok(out)
    }

    pub(super) fn gather(
        &self,
        x: &[usize],
        axis: usize,
        indices: &[usize],
    ) -> Result<Vec<usize>, GraphError> {
        if axis >= x.len() {
            return Err(self.bad_param("axis", format!("{axis} is past the rank of {x:?}")));
        }
        if indices.is_empty() || indices.iter().any(|&i| i >= x[axis]) {
            return Err(self.bad_param(
                "indices",
                format!("need 1 or more indices below {}, got {indices:?}", x[axis]),
            ));
        }
        let mut out = x.to_vec();
        out[axis] = indices.len();
        Ok(out)
    }

    pub(super) fn expand(&self, x: &[usize], shape: &[usize]) -> Result<Vec<usize>, GraphError> {
        let fits = shape.len() == x.len()
            && x.iter()
                .zip(shape)
                .all(|(&a, &b)| b >= 1 && (a == b || a == 1));
        if !fits {
            return Err(self.bad_param(
                "shape",
                format!(
                    "{x:?} cannot be broadcast to {shape:?} (same rank, each axis equal or from 1)"
                ),
            ));
        }
        Ok(shape.to_vec())
    }

    pub(super) fn tile(&self, x: &[usize], repeats: &[usize]) -> Result<Vec<usize>, GraphError> {
        if repeats.len() != x.len() || repeats.contains(&0) {
            return Err(self.bad_param(
                "repeats",
                format!("{repeats:?}: need one count ≥ 1 per axis of {x:?}"),
            ));
        }
        x.iter()
            .zip(repeats)
            .map(|(&d, &r)| {
                d.checked_mul(r)
                    .ok_or_else(|| self.bad_param("repeats", format!("{repeats:?} overflows")))
            })
            .collect()
    }

    pub(super) fn reduce(
        &self,
        x: &[usize],
        axes: &[usize],
        keep_dims: bool,
    ) -> Result<Vec<usize>, GraphError> {
        let mut seen = vec![false; x.len()];
        let valid = !axes.is_empty()
            && axes
                .iter()
                .all(|&a| a < x.len() && !std::mem::replace(&mut seen[a], true));
        if !valid {
            return Err(self.bad_param("axes", format!("{axes:?} for a value of shape {x:?}")));
        }
        let out: Vec<usize> = if keep_dims {
            x.iter()
                .enumerate()
                .map(|(i, &d)| if seen[i] { 1 } else { d })
                .collect()
        } else {
            let kept: Vec<usize> = (0..x.len()).filter(|&i| !seen[i]).map(|i| x[i]).collect();
            if kept.is_empty() { vec![1] } else { kept }
        };
        Ok(out)
    }

    pub(super) fn layer_norm(
        &self,
        x: &[usize],
        has_bias: bool,
        axis: usize,
        count: usize,
        epsilon: f32,
    ) -> Result<Vec<usize>, GraphError> {
        if count == 0 || axis.checked_add(count).is_none_or(|end| end > x.len()) {
            return Err(self.bad_param(
                "axis/count",
                format!("{count} axes from axis {axis} do not fit {x:?}"),
            ));
        }
        if !(epsilon.is_finite() && epsilon >= 0.0) {
            return Err(self.bad_param("epsilon", format!("{epsilon} is not a finite value ≥ 0")));
        }
        let block = &x[axis..axis + count];
        self.expect_tensor("scale", block)?;
        if has_bias {
            self.expect_tensor("bias", block)?;
        }
        Ok(x.to_vec())
    }
}
