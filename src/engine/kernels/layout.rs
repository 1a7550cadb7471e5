//! Ops that move data without arithmetic: strided copies (transpose, slice, expand, tile),
//! gather along one axis, and concatenation along one axis, each on one sample.
//!
//! Every transpose, slice, broadcast and tile is the same loop: walk the output in row-major
//! order and read the input at `offset + Σ index[i] · stride[i]`, with a stride of 0 on a
//! broadcast axis and a negative one for a reversed slice. [`StridedCopy`] builds those strides
//! once per plan and merges axes that stay contiguous, so the innermost loop is a `memcpy` of a
//! whole run wherever the layout allows (a channel shuffle copies whole planes).

/// Row-major strides of `shape`.
pub fn row_major_strides(shape: &[usize]) -> Vec<isize> {
    let mut strides = vec![0isize; shape.len()];
    let mut s = 1isize;
    for (d, &n) in shape.iter().enumerate().rev() {
        strides[d] = s;
        s *= n as isize;
    }
    strides
}

/// Calls `run(out_start, [offset of each operand], len)` for each innermost run of a
/// row-major walk over `shape`; the operands' element `k` of a run is at
/// `offset + k · strides[last]`. `strides` holds one stride list per operand.
pub fn for_each_run<const K: usize>(
    shape: &[usize],
    strides: [&[isize]; K],
    base: [isize; K],
    mut run: impl FnMut(usize, [isize; K], usize),
) {
    let rank = shape.len();
    if rank == 0 || shape.contains(&0) {
        return;
    }
    let inner = shape[rank - 1];
    let mut index = [0usize; 16];
    let mut offset = base;
    let mut out = 0usize;
    loop {
        run(out, offset, inner);
        out += inner;
        // Odometer over the outer axes, last outer axis fastest.
        let mut d = rank - 1;
        loop {
            if d == 0 {
                return;
            }
            d -= 1;
            index[d] += 1;
            for (o, s) in offset.iter_mut().zip(&strides) {
                *o += s[d];
            }
            if index[d] < shape[d] {
                break;
            }
            for (o, s) in offset.iter_mut().zip(&strides) {
                *o -= s[d] * shape[d] as isize;
            }
            index[d] = 0;
        }
    }
}

/// Merges adjacent axes that walk memory contiguously in every operand and drops size-1
/// axes, so runs get as long as the layout allows. Keeps at least one axis.
pub fn merge_axes<const K: usize>(
    shape: &[usize],
    strides: [&[isize]; K],
) -> (Vec<usize>, [Vec<isize>; K]) {
    let mut out_shape: Vec<usize> = Vec::new();
    let mut out_strides: [Vec<isize>; K] = std::array::from_fn(|_| Vec::new());
    for (d, &n) in shape.iter().enumerate() {
        if n == 1 {
            continue;
        }
        let joins = out_shape.last().is_some_and(|_| {
            strides
                .iter()
                .zip(&out_strides)
                .all(|(s, o)| o.last().copied() == Some(s[d] * n as isize))
        });
        if joins {
            *out_shape.last_mut().expect("checked non-empty") *= n;
            for (s, o) in strides.iter().zip(out_strides.iter_mut()) {
                *o.last_mut().expect("same length as out_shape") = s[d];
            }
        } else {
            out_shape.push(n);
            for (s, o) in strides.iter().zip(out_strides.iter_mut()) {
                o.push(s[d]);
            }
        }
    }
    if out_shape.is_empty() {
        out_shape.push(1);
        for o in out_strides.iter_mut() {
            o.push(1);
        }
    }
    (out_shape, out_strides)
}

/// A copy that reads the input through strides: output element at row-major index `i` of
/// `shape` comes from input element `offset + Σ i_d · strides[d]`.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StridedCopy {
    shape: Vec<usize>,
    strides: Vec<isize>,
    offset: usize,
}

impl StridedCopy {
    fn new(shape: &[usize], strides: &[isize], offset: usize) -> StridedCopy {
        let (shape, [strides]) = merge_axes(shape, [strides]);
        StridedCopy {
            shape,
            strides,
            offset,
        }
    }

    /// Output axis `i` is input axis `perm[i]`.
    pub fn transpose(input: &[usize], perm: &[usize]) -> StridedCopy {
        let s = row_major_strides(input);
        let shape: Vec<usize> = perm.iter().map(|&p| input[p]).collect();
        let strides: Vec<isize> = perm.iter().map(|&p| s[p]).collect();
        StridedCopy::new(&shape, &strides, 0)
    }

    /// Per axis, `(axis, start, step, count)`; other axes are taken whole.
    pub fn slice(input: &[usize], ranges: &[(usize, usize, i64, usize)]) -> StridedCopy {
        let s = row_major_strides(input);
        let mut shape = input.to_vec();
        let mut strides = s.clone();
        let mut offset = 0usize;
        for &(axis, start, step, count) in ranges {
            shape[axis] = count;
            strides[axis] = s[axis] * step as isize;
            offset += start * s[axis] as usize;
        }
        StridedCopy::new(&shape, &strides, offset)
    }

    /// Broadcast of `input` to `output` (same rank; input axes equal or 1).
    pub fn expand(input: &[usize], output: &[usize]) -> StridedCopy {
        let s = row_major_strides(input);
        let strides: Vec<isize> = (0..input.len())
            .map(|d| if input[d] == 1 { 0 } else { s[d] })
            .collect();
        StridedCopy::new(output, &strides, 0)
    }

    /// `repeats[d]` copies of the input along each axis: output axis `d` of size
    /// `repeats[d] · input[d]` is walked as a repeat axis (stride 0) outside the input axis.
    pub fn tile(input: &[usize], repeats: &[usize]) -> StridedCopy {
        let s = row_major_strides(input);
        let mut shape = Vec::with_capacity(2 * input.len());
        let mut strides = Vec::with_capacity(2 * input.len());
        for d in 0..input.len() {
            shape.extend([repeats[d], input[d]]);
            strides.extend([0, s[d]]);
        }
        StridedCopy::new(&shape, &strides, 0)
    }

    /// Whether the copy reproduces its input unchanged (a transpose of size-1 axes, a slice
    /// of everything): the planner makes such a step an alias.
    pub fn is_identity(&self, input_len: usize) -> bool {
        self.offset == 0
            && self.shape.len() == 1
            && self.strides[0] == 1
            && self.shape[0] == input_len
    }

    /// One sample.
    pub fn run(&self, input: &[f32], output: &mut [f32]) {
        let inner_stride = self.strides[self.strides.len() - 1];
        for_each_run(
            &self.shape,
            [&self.strides],
            [self.offset as isize],
            |out, [at], n| {
                let dst = &mut output[out..out + n];
                match inner_stride {
                    1 => dst.copy_from_slice(&input[at as usize..at as usize + n]),
                    0 => dst.fill(input[at as usize]),
                    s => {
                        for (k, d) in dst.iter_mut().enumerate() {
                            *d = input[(at + k as isize * s) as usize];
                        }
                    }
                }
            },
        );
    }
}

/// `input` seen as `[outer, len, inner]`; the output is `[outer, indices.len(), inner]`.
pub fn gather(
    outer: usize,
    len: usize,
    inner: usize,
    indices: &[usize],
    input: &[f32],
    output: &mut [f32],
) {
    let mut at = 0;
    for o in 0..outer {
        for &i in indices {
            let src = &input[(o * len + i) * inner..][..inner];
            output[at..at + inner].copy_from_slice(src);
            at += inner;
        }
    }
}

/// Concatenation along an axis: each input is `[outer, block_i]` (`block_i` = its size along
/// the axis times everything after it); the output interleaves the blocks per outer index.
pub fn concat(outer: usize, inputs: &[(&[f32], usize)], output: &mut [f32]) {
    let mut at = 0;
    for o in 0..outer {
        for &(x, block) in inputs {
            output[at..at + block].copy_from_slice(&x[o * block..][..block]);
            at += block;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn iota(n: usize) -> Vec<f32> {
        (0..n).map(|v| v as f32).collect()
    }

    // Hand-worked: the transpose of a 2×3 matrix (definition of the transpose).
    #[test]
    fn transpose_2x3() {
        let c = StridedCopy::transpose(&[2, 3], &[1, 0]);
        let mut y = vec![0.0; 6];
        c.run(&iota(6), &mut y);
        assert_eq!(y, [0.0, 3.0, 1.0, 4.0, 2.0, 5.0]);
    }

    // A channel shuffle of 4 channels in 2 groups ([2, 2, plane] → transpose of the first two
    // axes) moves whole planes: channels 0, 2, 1, 3 (common practice, ShuffleNet's definition).
    #[test]
    fn channel_shuffle_moves_planes() {
        let plane = 3;
        let c = StridedCopy::transpose(&[2, 2, plane], &[1, 0, 2]);
        assert_eq!(c.shape.last(), Some(&plane), "planes stay whole runs");
        let mut y = vec![0.0; 12];
        c.run(&iota(12), &mut y);
        let channels: Vec<f32> = y.chunks(plane).map(|p| p[0] / plane as f32).collect();
        assert_eq!(channels, [0.0, 2.0, 1.0, 3.0]);
    }

    // Python's x[1::2] and x[::-1] on 0..6 (the language's slice rule).
    #[test]
    fn slices_with_steps() {
        let mut y = vec![0.0; 3];
        StridedCopy::slice(&[6], &[(0, 1, 2, 3)]).run(&iota(6), &mut y);
        assert_eq!(y, [1.0, 3.0, 5.0]);
        let mut y = vec![0.0; 6];
        StridedCopy::slice(&[6], &[(0, 5, -1, 6)]).run(&iota(6), &mut y);
        assert_eq!(y, [5.0, 4.0, 3.0, 2.0, 1.0, 0.0]);
    }

    // numpy.broadcast_to and numpy.tile on small arrays (their documented examples' shapes).
    #[test]
    fn expand_and_tile() {
        let mut y = vec![0.0; 6];
        StridedCopy::expand(&[1, 3], &[2, 3]).run(&iota(3), &mut y);
        assert_eq!(y, [0.0, 1.0, 2.0, 0.0, 1.0, 2.0]);
        let mut y = vec![0.0; 8];
        StridedCopy::tile(&[2, 2], &[1, 2]).run(&iota(4), &mut y);
        assert_eq!(y, [0.0, 1.0, 0.0, 1.0, 2.0, 3.0, 2.0, 3.0]);
    }

    #[test]
    fn identity_is_recognised() {
        assert!(StridedCopy::transpose(&[1, 4, 1], &[2, 1, 0]).is_identity(4));
        assert!(!StridedCopy::transpose(&[2, 2], &[1, 0]).is_identity(4));
    }

    #[test]
    fn gather_and_concat() {
        let mut y = vec![0.0; 4];
        gather(2, 3, 1, &[2, 0], &iota(6), &mut y);
        assert_eq!(y, [2.0, 0.0, 5.0, 3.0]);
        let a = iota(4);
        let b = [9.0f32, 9.0];
        let mut y = vec![0.0; 6];
        concat(2, &[(&a, 2), (&b, 1)], &mut y);
        assert_eq!(y, [0.0, 1.0, 9.0, 2.0, 3.0, 9.0]);
    }
}
