//! The linear layer `y = x w^T + b` as one candle custom op calling `gemm` directly.
//!
//! Built from candle ops, a linear layer transposes the weight (a strided view that the
//! matmul repacks, forward and backward) and adds the bias with `broadcast_add`, whose
//! backward is a slow strided sum (PERFORMANCE.md, item 4). Here the forward pass starts
//! each output row from the bias and accumulates `x w^T` through gemm's strides; the
//! backward pass is two gemm calls (`dx = dy w`, `dw = dy^T x`) and a column sum for
//! `db`. Multi-threading follows [`crate::threads::threads`].

use candle_core::{bail, CpuStorage, CustomOp3, Layout, Shape, Tensor};
use gemm::Parallelism;

use crate::raw::{strided_matmul, with_f32};
use crate::threads;

struct Affine {
    rows: usize,
    inp: usize,
    out: usize,
}

fn slice<'a>(s: &'a CpuStorage, l: &Layout, what: &str) -> candle_core::Result<&'a [f32]> {
    let CpuStorage::F32(v) = s else {
        bail!("affine: {what} must be f32")
    };
    match l.contiguous_offsets() {
        Some((a, b)) => Ok(&v[a..b]),
        None => bail!("affine: {what} must be contiguous"),
    }
}

fn par(work: usize) -> Parallelism {
    let n = threads::threads();
    // Splitting small products costs more than it saves.
    if n > 1 && work >= 1 << 18 {
        Parallelism::Rayon(n)
    } else {
        Parallelism::None
    }
}

/// `dst[m, n] (+)= lhs[m, k] * rhs[k, n]` with explicit row and column strides, `dst`
/// contiguous; threads as [`par`] decides.
///
/// # Safety
/// As [`strided_matmul`] with `dst_rs = n`.
#[allow(clippy::too_many_arguments)]
unsafe fn dense_matmul(
    m: usize,
    n: usize,
    k: usize,
    dst: *mut f32,
    accumulate: bool,
    lhs: *const f32,
    lhs_rs: usize,
    lhs_cs: usize,
    rhs: *const f32,
    rhs_rs: usize,
    rhs_cs: usize,
) {
    strided_matmul(
        m,
        n,
        k,
        dst,
        n,
        accumulate,
        lhs,
        lhs_rs as isize,
        lhs_cs as isize,
        rhs,
        rhs_rs as isize,
        rhs_cs as isize,
        par(m * n * k),
    );
}

impl CustomOp3 for Affine {
    fn name(&self) -> &'static str {
        "affine"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
        s3: &CpuStorage,
        l3: &Layout,
    ) -> candle_core::Result<(CpuStorage, Shape)> {
        let (rows, inp, out) = (self.rows, self.inp, self.out);
        let x = slice(s1, l1, "input")?;
        let w = slice(s2, l2, "weight")?;
        let b = slice(s3, l3, "bias")?;
        if x.len() != rows * inp || w.len() != out * inp || b.len() != out {
            bail!("affine: expected x [{rows}, {inp}], w [{out}, {inp}], b [{out}]");
        }
        let mut y = Vec::with_capacity(rows * out);
        for _ in 0..rows {
            y.extend_from_slice(b);
        }
        if inp > 0 && rows > 0 {
            // SAFETY: sizes checked above; w^T is read through strides (k: 1, n: inp).
            unsafe {
                dense_matmul(
                    rows,
                    out,
                    inp,
                    y.as_mut_ptr(),
                    true,
                    x.as_ptr(),
                    inp,
                    1,
                    w.as_ptr(),
                    1,
                    inp,
                )
            };
        }
        Ok((CpuStorage::F32(y), Shape::from((rows, out))))
    }

    fn bwd(
        &self,
        x: &Tensor,
        w: &Tensor,
        b: &Tensor,
        _res: &Tensor,
        grad: &Tensor,
    ) -> candle_core::Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        let (rows, inp, out) = (self.rows, self.inp, self.out);
        let mut dx = vec![0f32; rows * inp];
        let mut dw = vec![0f32; out * inp];
        let mut db = vec![0f32; out];
        with_f32(grad, |dy| {
            with_f32(x, |xv| {
                with_f32(w, |wv| {
                    if rows > 0 && inp > 0 {
                        // SAFETY: all buffers have the sizes checked in the forward pass.
                        unsafe {
                            // dx = dy w: [rows, out] x [out, inp]
                            dense_matmul(
                                rows,
                                inp,
                                out,
                                dx.as_mut_ptr(),
                                false,
                                dy.as_ptr(),
                                out,
                                1,
                                wv.as_ptr(),
                                inp,
                                1,
                            );
                            // dw = dy^T x: [out, rows] x [rows, inp]
                            dense_matmul(
                                out,
                                inp,
                                rows,
                                dw.as_mut_ptr(),
                                false,
                                dy.as_ptr(),
                                1,
                                out,
                                xv.as_ptr(),
                                inp,
                                1,
                            );
                        }
                    }
                    for r in 0..rows {
                        for (d, g) in db.iter_mut().zip(&dy[r * out..(r + 1) * out]) {
                            *d += g;
                        }
                    }
                })
            })
        })???;
        let dev = x.device();
        Ok((
            Some(Tensor::from_vec(dx, (rows, inp), dev)?),
            Some(Tensor::from_vec(dw, (out, inp), dev)?),
            Some(Tensor::from_vec(db, out, b.device())?),
        ))
    }
}

/// `x w^T + b` for `x` `[rows, in]`, `w` `[out, in]`, `b` `[out]`, with gradients.
pub fn affine(x: &Tensor, w: &Tensor, b: &Tensor) -> candle_core::Result<Tensor> {
    let (rows, inp) = x.dims2()?;
    let (out, inp2) = w.dims2()?;
    if inp2 != inp || b.dims() != [out] {
        bail!(
            "affine: x {:?}, w {:?}, b {:?} do not fit x [rows, in], w [out, in], b [out]",
            x.dims(),
            w.dims(),
            b.dims()
        );
    }
    let op = Affine { rows, inp, out };
    let (x, w, b) = (x.contiguous()?, w.contiguous()?, b.contiguous()?);
    x.apply_op3(&w, &b, op)
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
        let s = b.iter().fold(1e-30f32, |m, x| m.max(x.abs()));
        a.iter()
            .zip(&b)
            .fold(0f32, |m, (x, y)| m.max((x - y).abs()))
            / s
    }

    // Reference: candle's matmul + broadcast_add and their autograd.
    #[test]
    fn affine_matches_candle_ops_forward_and_backward() {
        let x = Var::from_tensor(&rand(&[37, 9], 1)).unwrap();
        let w = Var::from_tensor(&rand(&[5, 9], 2)).unwrap();
        let b = Var::from_tensor(&rand(&[5], 3)).unwrap();
        let want = x
            .as_tensor()
            .matmul(&w.as_tensor().t().unwrap())
            .unwrap()
            .broadcast_add(b.as_tensor())
            .unwrap();
        let got = affine(x.as_tensor(), w.as_tensor(), b.as_tensor()).unwrap();
        assert!(max_rel(&got, &want) < 1e-6);
        let k = rand(&[37, 5], 4);
        let gw = (want * &k).unwrap().sum_all().unwrap().backward().unwrap();
        let gg = (got * &k).unwrap().sum_all().unwrap().backward().unwrap();
        for v in [&x, &w, &b] {
            let e = max_rel(
                gg.get(v.as_tensor()).unwrap(),
                gw.get(v.as_tensor()).unwrap(),
            );
            assert!(e < 1e-5, "gradient differs: {e}");
        }
        assert!(affine(x.as_tensor(), &rand(&[5, 8], 5), b.as_tensor()).is_err());
    }
}
