//! The unsafe helpers shared by the custom ops: raw pointers handed to worker threads,
//! a strided matrix product on raw pointers, and access to a CPU tensor's f32 data.
//!
//! Every `unsafe` item here states what its caller must guarantee. The ops that use them
//! ([`crate::lstm`], [`crate::affine`]) check shapes once, up front, and then work on raw
//! pointers so that several threads can write disjoint parts of one buffer.

use candle_core::{bail, CpuStorage, Layout, Storage, Tensor};
use gemm::Parallelism;

/// A pointer to a buffer that several threads write at the same time, each only its own,
/// disjoint set of elements.
///
/// Creating and copying one is safe; every write through it is `unsafe`, and the caller
/// must guarantee that (1) the buffer outlives every thread holding the pointer (use
/// scoped threads or join before the buffer is dropped), (2) no two threads touch the
/// same element without synchronisation between them (a barrier, a join), and (3) no
/// Rust reference to the buffer is used while the threads run.
#[derive(Clone, Copy)]
pub(crate) struct DisjointMut(pub(crate) *mut f32);
// SAFETY: the pointer is only a handle; the rules above make every access through it
// free of data races.
unsafe impl Send for DisjointMut {}
unsafe impl Sync for DisjointMut {}

/// A pointer to a buffer that several threads read and nobody writes while they run.
///
/// The caller must guarantee that the buffer outlives every thread holding the pointer
/// and is not written while they may read it.
#[derive(Clone, Copy)]
pub(crate) struct SharedRead(pub(crate) *const f32);
// SAFETY: reads of memory that nobody writes cannot race.
unsafe impl Send for SharedRead {}
unsafe impl Sync for SharedRead {}

/// `dst[m x n] = lhs[m x k] * rhs[k x n]`, or `+=` when `accumulate`, on raw pointers
/// with explicit strides (in elements): `dst` rows are `dst_rs` apart with columns
/// adjacent; `lhs` and `rhs` take a row and a column stride each, so a transposed
/// operand is read in place by swapping its strides.
///
/// # Safety
/// For every `r < m`, `c < n`, `i < k`: `dst + r*dst_rs + c` must be valid for reads and
/// writes, `lhs + r*lhs_rs + i*lhs_cs` and `rhs + i*rhs_rs + c*rhs_cs` valid for reads;
/// `dst` must not overlap either operand, and no other thread may access the `dst`
/// elements during the call.
#[allow(clippy::too_many_arguments)]
#[inline]
pub(crate) unsafe fn strided_matmul(
    m: usize,
    n: usize,
    k: usize,
    dst: *mut f32,
    dst_rs: usize,
    accumulate: bool,
    lhs: *const f32,
    lhs_rs: isize,
    lhs_cs: isize,
    rhs: *const f32,
    rhs_rs: isize,
    rhs_cs: isize,
    par: Parallelism,
) {
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            for r in 0..m {
                std::ptr::write_bytes(dst.add(r * dst_rs), 0, n);
            }
        }
        return;
    }
    gemm::gemm(
        m,
        n,
        k,
        dst,
        1,
        dst_rs as isize,
        accumulate,
        lhs,
        lhs_cs,
        lhs_rs,
        rhs,
        rhs_cs,
        rhs_rs,
        1.0,
        1.0,
        false,
        false,
        false,
        par,
    );
}

/// The contiguous f32 data of a custom op's input; `what` names it in errors
/// (`fused lstm: w_hh must be f32`).
pub(crate) fn f32_slice<'a>(
    s: &'a CpuStorage,
    l: &Layout,
    what: &str,
) -> candle_core::Result<&'a [f32]> {
    let CpuStorage::F32(v) = s else {
        bail!("{what} must be f32")
    };
    match l.contiguous_offsets() {
        Some((a, b)) => Ok(&v[a..b]),
        None => bail!("{what} must be contiguous"),
    }
}

/// Runs `f` on the contiguous f32 data of a CPU tensor (copying only if it is strided).
pub(crate) fn with_f32<R>(t: &Tensor, f: impl FnOnce(&[f32]) -> R) -> candle_core::Result<R> {
    let t = if t.is_contiguous() {
        t.clone()
    } else {
        t.contiguous()?
    };
    let (storage, layout) = t.storage_and_layout();
    match &*storage {
        Storage::Cpu(s) => Ok(f(f32_slice(s, layout, "mnemon-nets: tensor")?)),
        _ => bail!("mnemon-nets runs on the CPU only"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference: the plain triple loop, with a transposed left operand read in place and
    // a destination row stride wider than its columns.
    #[test]
    fn strided_matmul_matches_the_triple_loop() {
        let (m, n, k, dst_rs) = (5, 7, 3, 9);
        // lhs stored as [k, m] (transposed), rhs as [k, n]
        let lhs: Vec<f32> = (0..k * m).map(|i| (i as f32 * 0.37).sin()).collect();
        let rhs: Vec<f32> = (0..k * n).map(|i| (i as f32 * 0.11).cos()).collect();
        let mut dst = vec![1.0f32; m * dst_rs];
        // SAFETY: every index stays inside the three buffers.
        unsafe {
            strided_matmul(
                m,
                n,
                k,
                dst.as_mut_ptr(),
                dst_rs,
                true,
                lhs.as_ptr(),
                1,
                m as isize,
                rhs.as_ptr(),
                n as isize,
                1,
                Parallelism::None,
            )
        };
        for r in 0..m {
            for c in 0..dst_rs {
                let want = if c < n {
                    1.0 + (0..k).map(|i| lhs[i * m + r] * rhs[i * n + c]).sum::<f32>()
                } else {
                    1.0 // outside the n columns: untouched
                };
                assert!((dst[r * dst_rs + c] - want).abs() < 1e-5, "({r}, {c})");
            }
        }
        // k = 0 without accumulation writes zeros, with accumulation leaves dst alone
        // SAFETY: as above; k = 0 reads neither operand.
        unsafe {
            strided_matmul(
                2,
                n,
                0,
                dst.as_mut_ptr(),
                dst_rs,
                false,
                lhs.as_ptr(),
                1,
                1,
                rhs.as_ptr(),
                1,
                1,
                Parallelism::None,
            )
        };
        assert!(dst[..n].iter().all(|&x| x == 0.0));
        assert!(dst[dst_rs + n..2 * dst_rs].iter().all(|&x| x == 1.0));
    }
}
