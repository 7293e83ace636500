//! The element types the fused kernel runs in (f32 and f64) and their activations.

use std::ops::{Add, AddAssign, Div, Mul, MulAssign, Sub};

use candle_core::CpuStorage;

use super::pool::Pool;
use crate::nn::ops::{sigmoid_f64, tanh_f32_with, Activation};

/// The rational tanh of [`crate::nn::ops`] with fused multiply-adds: the loops that call it run
/// inside `pulp`'s dispatch, where FMA instructions are enabled.
#[inline(always)]
fn tanh_f32(x: f32) -> f32 {
    tanh_f32_with::<true>(x)
}

#[inline(always)]
fn sigmoid_f32(x: f32) -> f32 {
    0.5f32.mul_add(tanh_f32(0.5 * x), 0.5)
}

/// A floating-point element type of the fused kernel.
pub(crate) trait Real:
    Copy
    + Default
    + Send
    + Sync
    + PartialOrd
    + candle_core::WithDType
    + 'static
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + AddAssign
    + MulAssign
{
    const ZERO: Self;
    const ONE: Self;

    /// SiLU value and derivative, the same formulas as the generic ops of [`crate::nn::ops`].
    fn silu(x: Self) -> (Self, Self);

    /// tanh value and derivative, as in [`crate::nn::ops`].
    fn tanh(x: Self) -> (Self, Self);

    /// The values of a CPU storage of this type.
    fn slice(s: &CpuStorage) -> Option<&[Self]>;

    /// A CPU storage holding `v`.
    fn storage(v: Vec<Self>) -> CpuStorage;

    /// The process-wide pool of reusable buffers of this type.
    fn pool() -> &'static Pool<Self>;
}

impl Real for f32 {
    const ZERO: Self = 0.0;
    const ONE: Self = 1.0;

    #[inline(always)]
    fn silu(x: Self) -> (Self, Self) {
        let s = sigmoid_f32(x);
        (x * s, s * (1.0 + x * (1.0 - s)))
    }

    #[inline(always)]
    fn tanh(x: Self) -> (Self, Self) {
        let t = tanh_f32(x);
        (t, 1.0 - t * t)
    }

    fn slice(s: &CpuStorage) -> Option<&[Self]> {
        match s {
            CpuStorage::F32(v) => Some(v),
            _ => None,
        }
    }

    fn storage(v: Vec<Self>) -> CpuStorage {
        CpuStorage::F32(v)
    }

    fn pool() -> &'static Pool<Self> {
        static POOL: Pool<f32> = Pool::new();
        &POOL
    }
}

impl Real for f64 {
    const ZERO: Self = 0.0;
    const ONE: Self = 1.0;

    #[inline(always)]
    fn silu(x: Self) -> (Self, Self) {
        let s = sigmoid_f64(x);
        (x * s, s * (1.0 + x * (1.0 - s)))
    }

    #[inline(always)]
    fn tanh(x: Self) -> (Self, Self) {
        let t = x.tanh();
        (t, 1.0 - t * t)
    }

    fn slice(s: &CpuStorage) -> Option<&[Self]> {
        match s {
            CpuStorage::F64(v) => Some(v),
            _ => None,
        }
    }

    fn storage(v: Vec<Self>) -> CpuStorage {
        CpuStorage::F64(v)
    }

    fn pool() -> &'static Pool<Self> {
        static POOL: Pool<f64> = Pool::new();
        &POOL
    }
}

/// `a ∘= b` elementwise.
pub(crate) fn mul_in_place<T: Real>(a: &mut [T], b: &[T]) {
    pulp::Arch::new().dispatch(MulInPlace { a, b })
}

/// Applies `act` in place to the pre-activations in `h`, writing its derivative to `d`.
pub(crate) fn activate<T: Real>(act: Activation, h: &mut [T], d: &mut [T]) {
    pulp::Arch::new().dispatch(Activate { act, h, d })
}

// The loops below run inside `pulp`'s dispatch: their bodies are compiled for the widest
// vector instructions the CPU has (AVX2 and FMA where present, chosen at run time), so that
// the compiler vectorises them for those.

struct MulInPlace<'a, T> {
    a: &'a mut [T],
    b: &'a [T],
}

impl<T: Real> pulp::WithSimd for MulInPlace<'_, T> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, _simd: S) {
        for (a, &b) in self.a.iter_mut().zip(self.b) {
            *a *= b;
        }
    }
}

struct Activate<'a, T> {
    act: Activation,
    h: &'a mut [T],
    d: &'a mut [T],
}

impl<T: Real> pulp::WithSimd for Activate<'_, T> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, _simd: S) {
        activate_inner(self.act, self.h, self.d)
    }
}

#[inline(always)]
fn activate_inner<T: Real>(act: Activation, h: &mut [T], d: &mut [T]) {
    match act {
        Activation::Silu => {
            for (h, d) in h.iter_mut().zip(d.iter_mut()) {
                (*h, *d) = T::silu(*h);
            }
        }
        Activation::Tanh => {
            for (h, d) in h.iter_mut().zip(d.iter_mut()) {
                (*h, *d) = T::tanh(*h);
            }
        }
        Activation::Relu => {
            for (h, d) in h.iter_mut().zip(d.iter_mut()) {
                let pos = *h > T::ZERO;
                *d = if pos { T::ONE } else { T::ZERO };
                if !pos {
                    *h = T::ZERO;
                }
            }
        }
    }
}
