//! Output-size arithmetic for convolution and pooling windows, done once and checked.
//!
//! The relation is the one of Dumoulin & Visin, "A guide to convolution arithmetic for deep
//! learning" (2016), relationship 15 with dilation (their §5.1):
//! `o = floor((i + p_begin + p_end - d·(k - 1) - 1) / s) + 1`.
//! Pooling may round up instead (`ceil_mode`); then, as in PyTorch's pooling layers, a last
//! window that would start inside the end padding only is dropped.

use thiserror::Error;

/// Why a window does not fit its input.
#[derive(Clone, Debug, PartialEq, Eq, Error)]
pub enum WindowError {
    #[error("stride must be at least 1, got {stride}")]
    ZeroStride { stride: usize },
    #[error("dilation must be at least 1, got {dilation}")]
    ZeroDilation { dilation: usize },
    #[error("kernel size must be at least 1, got {kernel}")]
    ZeroKernel { kernel: usize },
    #[error(
        "window of {effective} (kernel {kernel}, dilation {dilation}) is larger than the padded input {padded}"
    )]
    WindowTooLarge {
        kernel: usize,
        dilation: usize,
        effective: usize,
        padded: usize,
    },
    #[error("padding {padding} is not smaller than the window {effective}")]
    PaddingTooLarge { padding: usize, effective: usize },
}

/// One spatial axis of a sliding window.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Window {
    pub input: usize,
    pub kernel: usize,
    pub stride: usize,
    pub dilation: usize,
    pub pad_begin: usize,
    pub pad_end: usize,
}

impl Window {
    /// Extent covered by one dilated kernel: `d·(k-1) + 1`.
    pub fn effective_kernel(&self) -> usize {
        self.dilation * (self.kernel - 1) + 1
    }

    /// Output length with floor rounding (convolution, and pooling without ceil mode).
    ///
    /// # Errors
    /// Zero stride, dilation or kernel, or a window larger than the padded input.
    pub fn output_len(&self) -> Result<usize, WindowError> {
        self.output_len_rounded(false)
    }

    /// Output length for pooling, rounding down or (with `ceil_mode`) up.
    ///
    /// # Errors
    /// As [`Window::output_len`], and padding on one side that is not smaller than the window
    /// (every output of such a window would read padding only; PyTorch refuses it too).
    pub fn pool_output_len(&self, ceil_mode: bool) -> Result<usize, WindowError> {
        let effective = self.check()?;
        let largest = self.pad_begin.max(self.pad_end);
        if largest >= effective {
            return Err(WindowError::PaddingTooLarge {
                padding: largest,
                effective,
            });
        }
        self.output_len_rounded(ceil_mode)
    }

    fn check(&self) -> Result<usize, WindowError> {
        if self.stride == 0 {
            return Err(WindowError::ZeroStride {
                stride: self.stride,
            });
        }
        if self.dilation == 0 {
            return Err(WindowError::ZeroDilation {
                dilation: self.dilation,
            });
        }
        if self.kernel == 0 {
            return Err(WindowError::ZeroKernel {
                kernel: self.kernel,
            });
        }
        Ok(self.effective_kernel())
    }

    fn output_len_rounded(&self, ceil_mode: bool) -> Result<usize, WindowError> {
        let effective = self.check()?;
        let padded = self.input + self.pad_begin + self.pad_end;
        if effective > padded {
            return Err(WindowError::WindowTooLarge {
                kernel: self.kernel,
                dilation: self.dilation,
                effective,
                padded,
            });
        }
        let span = padded - effective;
        let mut out = if ceil_mode {
            span.div_ceil(self.stride) + 1
        } else {
            span / self.stride + 1
        };
        // A ceil-mode window must start inside the input or the begin padding.
        if ceil_mode && out > 1 && (out - 1) * self.stride >= self.input + self.pad_begin {
            out -= 1;
        }
        Ok(out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn w(i: usize, k: usize, s: usize, p: usize, d: usize) -> Window {
        Window {
            input: i,
            kernel: k,
            stride: s,
            dilation: d,
            pad_begin: p,
            pad_end: p,
        }
    }

    // Worked examples of Dumoulin & Visin (2016), "A guide to convolution arithmetic for deep
    // learning", figures 2.1-2.7 and 5.1 (figure numbers from memory; the sizes are the
    // relations' own results and were recomputed by hand).
    #[test]
    fn dumoulin_visin_examples() {
        // Fig 2.1: no padding, unit strides, i=4, k=3 -> o=2 (relationship 1: o = i - k + 1).
        assert_eq!(w(4, 3, 1, 0, 1).output_len(), Ok(2));
        // Fig 2.2: arbitrary padding, i=5, k=4, p=2 -> o=6 (relationship 2).
        assert_eq!(w(5, 4, 1, 2, 1).output_len(), Ok(6));
        // Fig 2.3: half ("same") padding, i=5, k=3, p=1 -> o=5 (relationship 3).
        assert_eq!(w(5, 3, 1, 1, 1).output_len(), Ok(5));
        // Fig 2.4: full padding, i=5, k=3, p=2 -> o=7 (relationship 4: o = i + k - 1).
        assert_eq!(w(5, 3, 1, 2, 1).output_len(), Ok(7));
        // Fig 2.5: no padding, strides, i=5, k=3, s=2 -> o=2 (relationship 5).
        assert_eq!(w(5, 3, 2, 0, 1).output_len(), Ok(2));
        // Fig 2.6: padding and strides, i=5, k=3, s=2, p=1 -> o=3 (relationship 6).
        assert_eq!(w(5, 3, 2, 1, 1).output_len(), Ok(3));
        // Fig 2.7: padding and strides (odd), i=6, k=3, s=2, p=1 -> o=3: the floor drops a row.
        assert_eq!(w(6, 3, 2, 1, 1).output_len(), Ok(3));
        // Fig 5.1: dilated convolution, i=7, k=3, d=2, s=1, p=0 -> o=3 (relationship 15).
        assert_eq!(w(7, 3, 1, 0, 2).output_len(), Ok(3));
    }

    // Pooling arithmetic is the same relation (Dumoulin & Visin §3, relationship 7).
    #[test]
    fn pooling_relation() {
        // i=5, k=3, s=1 -> 3 (relationship 7: o = floor((i - k)/s) + 1).
        assert_eq!(w(5, 3, 1, 0, 1).pool_output_len(false), Ok(3));
        // 2x2 stride 2 halves an even input.
        assert_eq!(w(28, 2, 2, 0, 1).pool_output_len(false), Ok(14));
    }

    // Ceil mode as PyTorch's MaxPool2d documents it: ceil((i + 2p - d(k-1) - 1)/s) + 1, dropping
    // a last window that starts in the end padding.
    #[test]
    fn ceil_mode() {
        assert_eq!(w(11, 2, 2, 0, 1).pool_output_len(false), Ok(5));
        assert_eq!(w(11, 2, 2, 0, 1).pool_output_len(true), Ok(6));
        // i=6, k=3, s=2, p=1: ceil gives 4; the 4th window starts at input index 5, so it stays.
        assert_eq!(w(6, 3, 2, 1, 1).pool_output_len(true), Ok(4));
        // i=5, k=2, s=2, p=1: ceil gives 4, but the 4th window would start at padded index 6,
        // which is end padding only, so it is dropped.
        assert_eq!(w(5, 2, 2, 1, 1).pool_output_len(true), Ok(3));
    }

    #[test]
    fn refusals() {
        assert!(matches!(
            w(2, 5, 1, 0, 1).output_len(),
            Err(WindowError::WindowTooLarge { .. })
        ));
        assert!(matches!(
            w(5, 3, 0, 0, 1).output_len(),
            Err(WindowError::ZeroStride { .. })
        ));
        assert!(matches!(
            w(5, 3, 1, 0, 0).output_len(),
            Err(WindowError::ZeroDilation { .. })
        ));
        assert!(matches!(
            w(5, 3, 1, 3, 1).pool_output_len(false),
            Err(WindowError::PaddingTooLarge { .. })
        ));
    }
}
