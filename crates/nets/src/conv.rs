//! The conv torso's convolution as im2col + one matmul, forward and backward.
//!
//! candle's `conv2d` is ~7x slower than PyTorch on our CPUs; unfolding the patches
//! (im2col, a custom op whose backward is col2im) and multiplying by the weight
//! `[out, in*k*k]` as one matmul is as fast as the matmul. Activations are kept
//! channels-last (`[n, h, w, c]`), so a layer's matmul output `[n*oh*ow, out]` is the next
//! layer's input without a transpose. Convolutions are "valid" (no padding).
//! Weights use the usual `[out, in, k, k]` layout, so the op is checked against candle's
//! `conv2d` in the tests.

use candle_core::{bail, CpuStorage, CustomOp1, Layout, Shape, Tensor};

/// Geometry of one valid convolution over channels-last input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvGeom {
    /// Images in the batch.
    pub n: usize,
    /// Input height.
    pub h: usize,
    /// Input width.
    pub w: usize,
    /// Input channels.
    pub c: usize,
    /// Square kernel size.
    pub k: usize,
    /// Stride.
    pub stride: usize,
}

impl ConvGeom {
    /// Output height.
    pub fn oh(&self) -> usize {
        (self.h - self.k) / self.stride + 1
    }
    /// Output width.
    pub fn ow(&self) -> usize {
        (self.w - self.k) / self.stride + 1
    }
    /// Columns of the unfolded matrix (`c * k * k`).
    pub fn cols(&self) -> usize {
        self.c * self.k * self.k
    }
}

struct Im2col(ConvGeom);

impl Im2col {
    /// For each output row and column, the input offset: calls `f(col_index, in_index)`.
    #[inline]
    fn for_each(&self, mut f: impl FnMut(usize, usize)) {
        let g = self.0;
        let (oh, ow, kk) = (g.oh(), g.ow(), g.k * g.k);
        let cols = g.cols();
        for n in 0..g.n {
            for oy in 0..oh {
                for ox in 0..ow {
                    let row = (n * oh + oy) * ow + ox;
                    for ky in 0..g.k {
                        for kx in 0..g.k {
                            let iy = oy * g.stride + ky;
                            let ix = ox * g.stride + kx;
                            let src = ((n * g.h + iy) * g.w + ix) * g.c;
                            let dst = row * cols + ky * g.k + kx;
                            for ch in 0..g.c {
                                f(dst + ch * kk, src + ch);
                            }
                        }
                    }
                }
            }
        }
    }
}

impl CustomOp1 for Im2col {
    fn name(&self) -> &'static str {
        "im2col"
    }

    fn cpu_fwd(&self, s: &CpuStorage, l: &Layout) -> candle_core::Result<(CpuStorage, Shape)> {
        let g = self.0;
        let CpuStorage::F32(v) = s else {
            bail!("im2col: input must be f32")
        };
        let Some((a, b)) = l.contiguous_offsets() else {
            bail!("im2col: input must be contiguous")
        };
        let x = &v[a..b];
        if x.len() != g.n * g.h * g.w * g.c {
            bail!(
                "im2col: expected [{}, {}, {}, {}], got {:?}",
                g.n,
                g.h,
                g.w,
                g.c,
                l.shape()
            );
        }
        let rows = g.n * g.oh() * g.ow();
        let mut out = vec![0f32; rows * g.cols()];
        self.for_each(|d, s| out[d] = x[s]);
        Ok((CpuStorage::F32(out), Shape::from((rows, g.cols()))))
    }

    fn bwd(
        &self,
        arg: &Tensor,
        _res: &Tensor,
        grad_res: &Tensor,
    ) -> candle_core::Result<Option<Tensor>> {
        let g = self.0;
        let mut dx = vec![0f32; g.n * g.h * g.w * g.c];
        crate::raw::with_f32(grad_res, |gr| self.for_each(|d, s| dx[s] += gr[d]))?;
        Ok(Some(Tensor::from_vec(dx, arg.shape(), arg.device())?))
    }
}

/// Unfolds channels-last input `[n, h, w, c]` into `[n*oh*ow, c*k*k]` (column order
/// channel, kernel row, kernel column, matching a `[out, c, k, k]` weight).
pub fn im2col(x: &Tensor, g: ConvGeom) -> crate::Result<Tensor> {
    let dims = x.dims();
    if dims != [g.n, g.h, g.w, g.c] {
        return Err(crate::Error::shape(
            "im2col",
            format!("[{}, {}, {}, {}]", g.n, g.h, g.w, g.c),
            format!("{dims:?}"),
        ));
    }
    if g.k > g.h || g.k > g.w || g.stride == 0 {
        return Err(crate::Error::Spec(format!(
            "conv kernel {} stride {} does not fit a {}x{} input",
            g.k, g.stride, g.h, g.w
        )));
    }
    Ok(x.contiguous()?.apply_op1(Im2col(g))?)
}

/// One valid convolution over channels-last input: `[n, h, w, c]` -> `[n, oh, ow, out]`
/// (before any activation). `w` is `[out, c, k, k]`, `b` is `[out]`.
pub fn conv2d_nhwc(x: &Tensor, w: &Tensor, b: &Tensor, stride: usize) -> crate::Result<Tensor> {
    let (n, h, wd, c) = x.dims4()?;
    let (out, c2, k, k2) = w.dims4()?;
    if c2 != c || k != k2 {
        return Err(crate::Error::shape(
            "conv weight",
            format!("[out, {c}, k, k]"),
            format!("{:?}", w.dims()),
        ));
    }
    let g = ConvGeom {
        n,
        h,
        w: wd,
        c,
        k,
        stride,
    };
    let cols = im2col(x, g)?;
    let y = crate::network::affine(&cols, &w.reshape((out, c * k * k))?, b)?;
    Ok(y.reshape((n, g.oh(), g.ow(), out))?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Var};

    fn rand(shape: &[usize], seed: u64) -> Tensor {
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let n: usize = shape.iter().product();
        Tensor::from_vec(
            (0..n)
                .map(|_| rng.random_range(-1f32..1.0))
                .collect::<Vec<_>>(),
            shape,
            &Device::Cpu,
        )
        .unwrap()
    }

    fn max_rel(a: &Tensor, b: &Tensor) -> f32 {
        let a = a.flatten_all().unwrap().to_vec1::<f32>().unwrap();
        let b = b.flatten_all().unwrap().to_vec1::<f32>().unwrap();
        let s = b.iter().fold(0f32, |m, x| m.max(x.abs()));
        a.iter()
            .zip(&b)
            .fold(0f32, |m, (x, y)| m.max((x - y).abs()))
            / s
    }

    // Reference: candle's conv2d (NCHW) and its autograd.
    #[test]
    fn im2col_conv_matches_candle_conv2d_forward_and_backward() {
        // candle's conv2d backward refuses inputs whose last rows or columns the stride
        // skips, so each case uses an input the kernel covers exactly.
        for (k, stride, h, w) in [(3, 1, 7, 6), (2, 2, 8, 6), (3, 2, 7, 9)] {
            let x = Var::from_tensor(&rand(&[3, 2, h, w], 1)).unwrap(); // NCHW
            let w = Var::from_tensor(&rand(&[4, 2, k, k], 2)).unwrap();
            let b = Var::from_tensor(&rand(&[4], 3)).unwrap();
            let want = x
                .as_tensor()
                .conv2d(w.as_tensor(), 0, stride, 1, 1)
                .unwrap()
                .broadcast_add(&b.as_tensor().reshape((1, 4, 1, 1)).unwrap())
                .unwrap(); // [n, out, oh, ow]
            let nhwc = x.as_tensor().permute((0, 2, 3, 1)).unwrap();
            let got = conv2d_nhwc(&nhwc, w.as_tensor(), b.as_tensor(), stride)
                .unwrap()
                .permute((0, 3, 1, 2))
                .unwrap();
            assert!(max_rel(&got, &want) < 1e-6, "forward k={k} s={stride}");
            let weights = rand(want.dims(), 4);
            let gw = (want * &weights)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            let gg = (got * &weights)
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            for v in [&x, &w, &b] {
                let e = max_rel(
                    gg.get(v.as_tensor()).unwrap(),
                    gw.get(v.as_tensor()).unwrap(),
                );
                assert!(e < 1e-5, "gradient differs k={k} s={stride}: {e}");
            }
        }
    }

    #[test]
    fn kernel_larger_than_input_is_an_error() {
        let x = rand(&[1, 2, 2, 1], 5);
        assert!(im2col(
            &x,
            ConvGeom {
                n: 1,
                h: 2,
                w: 2,
                c: 1,
                k: 3,
                stride: 1
            }
        )
        .is_err());
    }
}
