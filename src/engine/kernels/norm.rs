//! Normalisation and reductions over arbitrary axes of one sample: layer normalisation and
//! the mean / max / sum / Euclidean norm of `Reduce`.
//!
//! Sums run in `f64` in a fixed order (the input's row-major order), so a result never
//! depends on the batch or on anything but the sample, and is rounded to `f32` once.

use super::layout::{for_each_run, merge_axes, row_major_strides};
use crate::graph::ReduceKind;

/// Layer normalisation of a sample seen as `[outer, block, inner]`: every `(outer, inner)`
/// position is normalised over its `block` values (mean 0, variance 1, the biased variance
/// as PyTorch's `nn.LayerNorm` and ONNX's LayerNormalization use), then scaled and shifted by
/// `scale[b]`, `bias[b]`. `sums` is scratch space (grown once, reused).
#[allow(clippy::too_many_arguments)]
pub fn layer_norm(
    [outer, block, inner]: [usize; 3],
    scale: &[f32],
    bias: Option<&[f32]>,
    epsilon: f32,
    input: &[f32],
    output: &mut [f32],
    sums: &mut Vec<f64>,
) {
    if sums.len() < 2 * inner {
        sums.resize(2 * inner, 0.0);
    }
    let (mean, var) = sums.split_at_mut(inner);
    let var = &mut var[..inner];
    let n = block as f64;
    for o in 0..outer {
        let x = &input[o * block * inner..][..block * inner];
        let y = &mut output[o * block * inner..][..block * inner];
        mean.fill(0.0);
        var.fill(0.0);
        for row in x.chunks_exact(inner) {
            for (m, &v) in mean.iter_mut().zip(row) {
                *m += f64::from(v);
            }
        }
        mean.iter_mut().for_each(|m| *m /= n);
        for row in x.chunks_exact(inner) {
            for ((s, &m), &v) in var.iter_mut().zip(mean.iter()).zip(row) {
                let d = f64::from(v) - m;
                *s += d * d;
            }
        }
        // 1/sqrt(var + eps), in f64 and rounded once.
        var.iter_mut()
            .for_each(|s| *s = 1.0 / (*s / n + f64::from(epsilon)).sqrt());
        for (b, (row, out)) in x
            .chunks_exact(inner)
            .zip(y.chunks_exact_mut(inner))
            .enumerate()
        {
            let (g, t) = (scale[b], bias.map_or(0.0, |bias| bias[b]));
            for ((d, &v), (&m, &r)) in out.iter_mut().zip(row).zip(mean.iter().zip(var.iter())) {
                *d = ((f64::from(v) - m) * r) as f32 * g + t;
            }
        }
    }
}

/// A reduction planned once: the input walked in row-major order, each element landing in
/// the output cell that `strides` (0 on reduced axes) points at.
#[derive(Clone, Debug)]
pub struct ReducePlan {
    kind: ReduceKind,
    shape: Vec<usize>,
    strides: Vec<isize>,
    out_len: usize,
    /// Input elements per output element.
    count: usize,
}

impl ReducePlan {
    /// Reduces `input` (a per-sample shape) over `axes`.
    pub fn new(kind: ReduceKind, input: &[usize], axes: &[usize]) -> ReducePlan {
        let kept: Vec<usize> = (0..input.len())
            .map(|d| if axes.contains(&d) { 1 } else { input[d] })
            .collect();
        let mut strides = row_major_strides(&kept);
        for &a in axes {
            strides[a] = 0;
        }
        let (shape, [_, strides]) = merge_axes(input, [&row_major_strides(input), &strides]);
        let out_len: usize = kept.iter().product();
        ReducePlan {
            kind,
            count: input.iter().product::<usize>() / out_len.max(1),
            shape,
            strides,
            out_len,
        }
    }

    /// One sample; `acc` is scratch space.
    pub fn run(&self, input: &[f32], output: &mut [f32], acc: &mut Vec<f64>) {
        if acc.len() < self.out_len {
            acc.resize(self.out_len, 0.0);
        }
        let acc = &mut acc[..self.out_len];
        let start = if self.kind == ReduceKind::Max {
            f64::NEG_INFINITY
        } else {
            0.0
        };
        acc.fill(start);
        let inner = self.strides[self.strides.len() - 1];
        let kind = self.kind;
        for_each_run(&self.shape, [&self.strides], [0], |at, [o], n| {
            for (k, &v) in input[at..at + n].iter().enumerate() {
                let cell = &mut acc[(o + k as isize * inner) as usize];
                let v = f64::from(v);
                *cell = match kind {
                    ReduceKind::Mean | ReduceKind::Sum => *cell + v,
                    ReduceKind::L2 => *cell + v * v,
                    // NaN propagates, as numpy's max (the ONNX reference evaluator's).
                    ReduceKind::Max if v.is_nan() || cell.is_nan() => f64::NAN,
                    ReduceKind::Max => cell.max(v),
                };
            }
        });
        let n = self.count as f64;
        for (y, &a) in output[..self.out_len].iter_mut().zip(acc.iter()) {
            *y = match kind {
                ReduceKind::Mean => a / n,
                ReduceKind::L2 => a.sqrt(),
                ReduceKind::Sum | ReduceKind::Max => a,
            } as f32;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hand-worked: [1, 2, 3] has mean 2 and biased variance 2/3, so the normalised values are
    // (x - 2) / sqrt(2/3) = ∓1.2247, 0 (the layer-norm definition, Ba et al. 2016).
    #[test]
    fn layer_norm_of_a_row() {
        let mut y = [0.0f32; 3];
        let mut sums = Vec::new();
        layer_norm(
            [1, 3, 1],
            &[1.0; 3],
            None,
            0.0,
            &[1.0, 2.0, 3.0],
            &mut y,
            &mut sums,
        );
        let r = (1.5f64).sqrt() as f32;
        assert!((y[0] + r).abs() < 1e-6 && y[1].abs() < 1e-7 && (y[2] - r).abs() < 1e-6);
    }

    // Channels-first: normalising over the leading axis of [C=2, inner=2] treats each
    // position separately.
    #[test]
    fn layer_norm_over_channels() {
        let x = [0.0f32, 10.0, 2.0, 30.0]; // position 0: (0, 2); position 1: (10, 30)
        let mut y = [0.0f32; 4];
        layer_norm(
            [1, 2, 2],
            &[1.0, 2.0],
            Some(&[0.0, 1.0]),
            0.0,
            &x,
            &mut y,
            &mut Vec::new(),
        );
        assert_eq!(y, [-1.0, -1.0, 3.0, 3.0]);
    }

    // numpy.mean / max / sum / linalg.norm over axes of a 2×3 array, worked by hand.
    #[test]
    fn reductions() {
        let x = [1.0f32, 2.0, 3.0, 4.0, 5.0, 6.0];
        let run = |kind, axes: &[usize]| {
            let p = ReducePlan::new(kind, &[2, 3], axes);
            let mut y = vec![0.0; p.out_len];
            p.run(&x, &mut y, &mut Vec::new());
            y
        };
        assert_eq!(run(ReduceKind::Mean, &[0]), [2.5, 3.5, 4.5]);
        assert_eq!(run(ReduceKind::Sum, &[1]), [6.0, 15.0]);
        assert_eq!(run(ReduceKind::Max, &[0, 1]), [6.0]);
        assert_eq!(run(ReduceKind::L2, &[1]), [14f32.sqrt(), 77f32.sqrt()]);
    }
}
