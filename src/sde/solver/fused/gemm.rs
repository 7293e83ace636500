//! Row-major matrix products on slices, through the `gemm` crate (the kernels candle's CPU
//! backend uses), without allocation or autodiff bookkeeping.
//!
//! Every function checks the slice lengths against the dimensions before the unchecked call,
//! so a wrong size is a panic (a bug in this crate), never an out-of-bounds access.

#![allow(unsafe_code)]

use gemm::Parallelism;

use super::real::Real;

/// How a matrix operand is read.
#[derive(Clone, Copy)]
pub(crate) enum Op {
    /// As stored: row-major `(rows, cols)`.
    N,
    /// Transposed: the operand is stored row-major `(cols, rows)`.
    T,
}

/// `c (m×n) = [c +] a' · b'`, where `a'` (m×k) and `b'` (k×n) are `a` and `b` read as `ta`
/// and `tb` say, all row-major; `accumulate` adds to `c` instead of overwriting it. Runs on
/// the calling thread: the kernel parallelises over blocks of rows instead.
pub(crate) fn matmul<T: Real>(
    c: &mut [T],
    a: &[T],
    ta: Op,
    b: &[T],
    tb: Op,
    (m, n, k): (usize, usize, usize),
    accumulate: bool,
) {
    assert!(c.len() >= m * n, "matmul: output too short");
    assert!(a.len() >= m * k, "matmul: left operand too short");
    assert!(b.len() >= k * n, "matmul: right operand too short");
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            c[..m * n].fill(T::ZERO);
        }
        return;
    }
    // (row stride, column stride) of the logical operands.
    let (a_rs, a_cs) = match ta {
        Op::N => (k as isize, 1),
        Op::T => (1, m as isize),
    };
    let (b_rs, b_cs) = match tb {
        Op::N => (n as isize, 1),
        Op::T => (1, k as isize),
    };
    // SAFETY: the lengths were checked above: every index the strides reach lies inside the
    // slices (rows < m·k etc.), `c` is borrowed mutably and so cannot alias `a` or `b`, and
    // `T` is f32 or f64, both supported by `gemm`.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            1,
            n as isize,
            accumulate,
            a.as_ptr(),
            a_cs,
            a_rs,
            b.as_ptr(),
            b_cs,
            b_rs,
            T::ONE,
            T::ONE,
            false,
            false,
            false,
            Parallelism::None,
        );
    }
}

/// Adds the column sums of the row-major `(rows, n)` matrix `a` to `out` (length `n`).
pub(crate) fn add_column_sums<T: Real>(out: &mut [T], a: &[T], n: usize) {
    pulp::Arch::new().dispatch(ColumnSums { out, a, n })
}

/// Copies `row` into every row of the row-major matrix `m`.
pub(crate) fn fill_rows<T: Real>(m: &mut [T], row: &[T]) {
    pulp::Arch::new().dispatch(FillRows { m, row })
}

// Bodies compiled for the CPU's widest vector unit, chosen at run time (see `real.rs`).

struct ColumnSums<'a, T> {
    out: &'a mut [T],
    a: &'a [T],
    n: usize,
}

impl<T: Real> pulp::WithSimd for ColumnSums<'_, T> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, _simd: S) {
        for row in self.a.chunks_exact(self.n) {
            for (o, &v) in self.out.iter_mut().zip(row) {
                *o += v;
            }
        }
    }
}

struct FillRows<'a, T> {
    m: &'a mut [T],
    row: &'a [T],
}

impl<T: Real> pulp::WithSimd for FillRows<'_, T> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, _simd: S) {
        // One row, then doubling copies: a few large copies instead of one per row.
        let n = self.row.len();
        let len = self.m.len() / n * n;
        if len == 0 {
            return;
        }
        self.m[..n].copy_from_slice(self.row);
        let mut done = n;
        while done < len {
            let k = done.min(len - done);
            self.m.copy_within(..k, done);
            done += k;
        }
    }
}
