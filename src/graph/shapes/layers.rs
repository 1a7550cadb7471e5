//! Shapes of the layers with weights or windows: convolution, batch normalisation, dense,
//! pooling, padding.

use super::{Ctx, GraphError, MAX_VALUE_ELEMENTS};
use crate::graph::arith::Window;
use crate::graph::{Op, WeightLayout};

impl Ctx<'_> {
    pub(super) fn conv(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        let Op::Conv2d {
            bias,
            stride,
            dilation,
            padding,
            groups,
            ..
        } = op
        else {
            unreachable!("dispatched on Conv2d")
        };
        let [c, h, w] = self.chw(self.one_input(ins)?)?;
        let (wname, wshape) = self.tensor("weight");
        let &[oc, icg, kh, kw] = wshape.as_slice() else {
            return Err(GraphError::TensorShape {
                node: self.node.to_string(),
                op: self.op,
                role: "weight",
                tensor: wname.clone(),
                found: wshape.clone(),
                expected: "[out_c, in_c / groups, kh, kw]".into(),
            });
        };
        let g = *groups;
        if g == 0 || c % g != 0 || oc % g != 0 || oc == 0 {
            return Err(self.bad_param(
                "groups",
                format!("{g} groups must divide both the {c} input and {oc} output channels"),
            ));
        }
        if icg != c / g {
            return Err(GraphError::TensorShape {
                node: self.node.to_string(),
                op: self.op,
                role: "weight",
                tensor: wname.clone(),
                found: wshape.clone(),
                expected: format!(
                    "[{oc}, {}, kh, kw] for {c} input channels in {g} groups",
                    c / g
                ),
            });
        }
        if bias.is_some() {
            self.expect_tensor("bias", &[oc])?;
        }
        let window = |input, kernel, axis: usize| Window {
            input,
            kernel,
            stride: stride[axis],
            dilation: dilation[axis],
            pad_begin: padding[axis],
            pad_end: padding[axis + 2],
        };
        let oh = self.window("height", window(h, kh, 0), None)?;
        let ow = self.window("width", window(w, kw, 1), None)?;
        Ok(vec![oc, oh, ow])
    }

    pub(super) fn batch_norm(
        &self,
        epsilon: f32,
        ins: &[Vec<usize>],
    ) -> Result<Vec<usize>, GraphError> {
        let x = self.one_input(ins)?;
        for role in ["gamma", "beta", "mean", "variance"] {
            self.expect_tensor(role, &[x[0]])?;
        }
        if !(epsilon.is_finite() && epsilon >= 0.0) {
            return Err(self.bad_param("epsilon", format!("{epsilon} is not a finite value ≥ 0")));
        }
        Ok(x.to_vec())
    }

    /// A dense layer over the last axis: `[..., F]` → `[..., out]` (a flat `[F]` value is the
    /// classic fully connected layer; more axes are channels-last Linear layers).
    pub(super) fn dense(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        let Op::Dense {
            bias,
            weight_layout,
            ..
        } = op
        else {
            unreachable!("dispatched on Dense")
        };
        let x = self.one_input(ins)?;
        let f = x[x.len() - 1];
        let (wname, wshape) = self.tensor("weight");
        let out = match (weight_layout, wshape.as_slice()) {
            (WeightLayout::OutIn, &[o, i]) if i == f => o,
            (WeightLayout::InOut, &[i, o]) if i == f => o,
            _ => {
                return Err(GraphError::TensorShape {
                    node: self.node.to_string(),
                    op: self.op,
                    role: "weight",
                    tensor: wname.clone(),
                    found: wshape.clone(),
                    expected: match weight_layout {
                        WeightLayout::OutIn => format!("[out, {f}]"),
                        WeightLayout::InOut => format!("[{f}, out]"),
                    },
                });
            }
        };
        if out == 0 {
            return Err(self.bad_param("weight", "a dense layer needs at least one output"));
        }
        if bias.is_some() {
            self.expect_tensor("bias", &[out])?;
        }
        let mut shape = x.to_vec();
        *shape.last_mut().expect("rank checked ≥ 1") = out;
        Ok(shape)
    }

    pub(super) fn pooling(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        let x = self.one_input(ins)?;
        match *op {
            Op::MaxPool {
                kernel,
                stride,
                padding,
                dilation,
                ceil_mode,
            } => self.pool(
                x,
                kernel,
                stride.unwrap_or(kernel),
                padding,
                dilation,
                ceil_mode,
            ),
            Op::AvgPool {
                kernel,
                stride,
                padding,
                ceil_mode,
                ..
            } => self.pool(
                x,
                kernel,
                stride.unwrap_or(kernel),
                padding,
                [1, 1],
                ceil_mode,
            ),
            _ => {
                let [c, _, _] = self.chw(x)?;
                Ok(vec![c, 1, 1])
            }
        }
    }

    fn pool(
        &self,
        x: &[usize],
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 4],
        dilation: [usize; 2],
        ceil_mode: bool,
    ) -> Result<Vec<usize>, GraphError> {
        let [c, h, w] = self.chw(x)?;
        let window = |input, axis: usize| Window {
            input,
            kernel: kernel[axis],
            stride: stride[axis],
            dilation: dilation[axis],
            pad_begin: padding[axis],
            pad_end: padding[axis + 2],
        };
        let oh = self.window("height", window(h, 0), Some(ceil_mode))?;
        let ow = self.window("width", window(w, 1), Some(ceil_mode))?;
        Ok(vec![c, oh, ow])
    }

    pub(super) fn pad(
        &self,
        padding: [usize; 4],
        channels: [usize; 2],
        value: f32,
        ins: &[Vec<usize>],
    ) -> Result<Vec<usize>, GraphError> {
        let [c, h, w] = self.chw(self.one_input(ins)?)?;
        let c = c
            .checked_add(channels[0])
            .and_then(|c| c.checked_add(channels[1]))
            .ok_or_else(|| self.bad_param("channels", "overflows"))?;
        if !value.is_finite() {
            return Err(self.bad_param("value", format!("{value} is not finite")));
        }
        let grow = |a: usize, b: usize, d: usize| (d as u128) + (a as u128) + (b as u128);
        let oh = grow(padding[0], padding[2], h);
        let ow = grow(padding[1], padding[3], w);
        if oh * ow * c as u128 > MAX_VALUE_ELEMENTS as u128 {
            return Err(GraphError::TooLarge {
                node: self.node.to_string(),
                op: self.op,
                elements: oh * ow * c as u128,
                limit: MAX_VALUE_ELEMENTS,
            });
        }
        Ok(vec![c, oh as usize, ow as usize])
    }
}
