//! Four f32 lanes, the vector width every target has: SSE2 on x86-64 (always present there),
//! WebAssembly SIMD (`simd128`, on in this project's wasm builds), and plain arrays elsewhere.
//!
//! The hot loops (range fits, round to nearest, error sums) are written once against this type,
//! so the native and the browser builds run the same instructions in the same order and give
//! the same results. Compilers do not vectorise those loops well on their own: the mix of
//! reductions and stores comes out as shuffles (seen in the generated code). Lane operations
//! follow IEEE 754 single precision exactly as the scalar code does; `max`/`min` are only
//! used on values already known not to be NaN, where all three targets agree.

use core::mem::MaybeUninit;

/// Four f32 lanes.
#[derive(Clone, Copy, Debug)]
pub struct F32x4(imp::Lanes);

/// Lanes per vector.
pub const LANES: usize = 4;

/// The exponent field of an f32 (IEEE 754 binary32: bits 23..31).
const EXPONENT_BITS: u32 = 0x7f80_0000;

/// `if b > a { b } else { a }`: max for values known not to be NaN. Unlike `f32::max`, whose
/// NaN rule WebAssembly's own instruction does not share (so it becomes a library call there),
/// this is one lane instruction on every target: written as a scalar `select`, V8 compiles it
/// to a branch, which mispredicts on data such as the two ends of a group's range.
#[inline(always)]
pub fn larger(a: f32, b: f32) -> f32 {
    F32x4::splat(a).max(F32x4::splat(b)).first()
}

/// `if b < a { b } else { a }`: min for values known not to be NaN (see [`larger`]).
#[inline(always)]
pub fn smaller(a: f32, b: f32) -> f32 {
    F32x4::splat(a).min(F32x4::splat(b)).first()
}

/// `s` as whole vectors of four values and the rest.
#[inline(always)]
pub fn quads(s: &[f32]) -> (&[[f32; 4]], &[f32]) {
    s.as_chunks::<4>()
}

/// `s` as whole vectors of four places and the rest, for writing.
#[inline(always)]
pub fn quads_mut(s: &mut [MaybeUninit<f32>]) -> (&mut [[MaybeUninit<f32>; 4]], &mut [MaybeUninit<f32>]) {
    s.as_chunks_mut::<4>()
}

/// Write `f` of every value of `x` to the places of `out` (as many), four lanes at a time. The
/// last one to three values go through the same vector code, padded with zeros, so every value
/// gets the same arithmetic whatever its position.
#[inline(always)]
pub(crate) fn map_lanes(x: &[f32], out: &mut [MaybeUninit<f32>], f: impl Fn(F32x4) -> F32x4) {
    let ((xs, x_rest), (outs, out_rest)) = (quads(x), quads_mut(out));
    for (o, v) in outs.iter_mut().zip(xs) {
        f(F32x4::load(v)).write(o);
    }
    if !x_rest.is_empty() {
        let mut tail = [0f32; LANES];
        tail[..x_rest.len()].copy_from_slice(x_rest);
        for (o, v) in out_rest.iter_mut().zip(f(F32x4::load(&tail)).to_array()) {
            o.write(v);
        }
    }
}

/// Smallest and largest of `seed` and the values of `x`. Every comparison skips a NaN (as
/// `f32::min`/`max` would); callers check finiteness where it matters.
#[inline(always)]
pub fn extremes(x: &[f32], seed: f32) -> (f32, f32) {
    extremes_checked::<false>(x, seed).0
}

/// [`extremes`], or `None` when a value of `x` is NaN or infinite.
#[inline(always)]
pub fn finite_extremes(x: &[f32], seed: f32) -> Option<(f32, f32)> {
    let (range, finite) = extremes_checked::<true>(x, seed);
    finite.then_some(range)
}

/// The one kernel of [`extremes`] and [`finite_extremes`]. With `CHECK`, every value times 0 is
/// also added up, which is 0 for finite values and NaN as soon as one is NaN or infinite (IEEE 754:
/// ∞ · 0 and NaN · 0 are NaN): finiteness in the same pass, with no comparison per value.
#[inline(always)]
fn extremes_checked<const CHECK: bool>(x: &[f32], seed: f32) -> ((f32, f32), bool) {
    // Two vectors of lanes keep two independent chains in flight.
    let (zero, seed) = (F32x4::splat(0.0), F32x4::splat(seed));
    let (mut lo, mut hi, mut poison) = ([seed; 2], [seed; 2], [zero; 2]);
    let (octets, rest) = x.as_chunks::<8>();
    for octet in octets {
        let halves = [octet.first_chunk::<4>().expect("8 values"), octet.last_chunk::<4>().expect("8 values")];
        for (half, values) in halves.into_iter().enumerate() {
            let v = F32x4::load(values);
            lo[half] = lo[half].min(v);
            hi[half] = hi[half].max(v);
            if CHECK {
                poison[half] = poison[half] + v * zero;
            }
        }
    }
    let lo = rest.iter().copied().fold(lo[0].min(lo[1]).min_lane(), smaller);
    let hi = rest.iter().copied().fold(hi[0].max(hi[1]).max_lane(), larger);
    let finite = !CHECK || ((poison[0] + poison[1]).to_array().iter().sum::<f32>() + rest.iter().map(|v| v * 0.0).sum::<f32>()) == 0.0;
    ((lo, hi), finite)
}

/// Initialised values seen as places to write: for kernels that write into fresh output
/// (never read before written) and into reused buffers alike.
#[inline(always)]
pub(crate) fn as_places(s: &mut [f32]) -> &mut [MaybeUninit<f32>] {
    // SAFETY: same layout; every writer of `MaybeUninit` places in this crate writes only
    // initialised f32 values, so `s` stays initialised.
    unsafe { &mut *(s as *mut [f32] as *mut [MaybeUninit<f32>]) }
}

impl F32x4 {
    /// All lanes `v`.
    #[inline(always)]
    pub fn splat(v: f32) -> Self {
        F32x4(imp::splat(v))
    }
    /// Four values.
    #[inline(always)]
    pub fn load(s: &[f32; 4]) -> Self {
        F32x4(imp::load(s))
    }
    /// Write the lanes to `s`.
    #[inline(always)]
    pub fn store(self, s: &mut [f32; 4]) {
        imp::store(self.0, s.as_mut_ptr())
    }
    /// Write the lanes to four places that need not be initialised.
    #[inline(always)]
    pub fn write(self, s: &mut [MaybeUninit<f32>; 4]) {
        imp::store(self.0, s.as_mut_ptr().cast())
    }
    /// Lane-wise `if o > self { o } else { self }`.
    #[inline(always)]
    pub fn max(self, o: Self) -> Self {
        F32x4(imp::max(self.0, o.0))
    }
    /// Lane-wise `if o < self { o } else { self }`.
    #[inline(always)]
    pub fn min(self, o: Self) -> Self {
        F32x4(imp::min(self.0, o.0))
    }
    /// Lane-wise |x| (clears the sign bit).
    #[inline(always)]
    pub fn abs(self) -> Self {
        F32x4(imp::abs(self.0))
    }
    /// Lane-wise power of two of each value's binade, 2^⌊log2 |x|⌋: only the exponent bits of
    /// each lane kept (so 0 for zeros and subnormals).
    #[inline(always)]
    pub fn binade(self) -> Self {
        F32x4(imp::binade(self.0))
    }
    /// Lane-wise |self| with the sign bit of `sign`.
    #[inline(always)]
    pub fn with_sign_of(self, sign: Self) -> Self {
        F32x4(imp::with_sign_of(self.0, sign.0))
    }
    /// Lane-wise `if self > threshold { then } else { otherwise }`.
    #[inline(always)]
    pub fn above(self, threshold: Self, then: Self, otherwise: Self) -> Self {
        F32x4(imp::above(self.0, threshold.0, then.0, otherwise.0))
    }
    /// The largest lane (by [`F32x4::max`], in lanes: no scalar comparisons, which WebAssembly
    /// engines turn into branches).
    #[inline(always)]
    pub fn max_lane(self) -> f32 {
        let half = self.max(F32x4(imp::swap_halves(self.0)));
        half.max(F32x4(imp::swap_pairs(half.0))).first()
    }
    /// The smallest lane (by [`F32x4::min`]).
    #[inline(always)]
    pub fn min_lane(self) -> f32 {
        let half = self.min(F32x4(imp::swap_halves(self.0)));
        half.min(F32x4(imp::swap_pairs(half.0))).first()
    }
    /// The first lane.
    #[inline(always)]
    pub fn first(self) -> f32 {
        imp::first(self.0)
    }
    /// The lanes as an array.
    #[inline(always)]
    pub fn to_array(self) -> [f32; 4] {
        let mut out = [0f32; 4];
        self.store(&mut out);
        out
    }
}

macro_rules! lane_wise {
    ($trait:ident, $method:ident) => {
        impl core::ops::$trait for F32x4 {
            type Output = F32x4;
            #[inline(always)]
            fn $method(self, o: F32x4) -> F32x4 {
                F32x4(imp::$method(self.0, o.0))
            }
        }
    };
}
lane_wise!(Add, add);
lane_wise!(Sub, sub);
lane_wise!(Mul, mul);
lane_wise!(Div, div);

// SAFETY (every `unsafe` block here): SSE and SSE2 belong to the x86-64 baseline, so these
// instructions exist on every CPU this code can run on; loads and stores touch exactly the four
// values of the array they are given.
#[cfg(target_arch = "x86_64")]
mod imp {
    use core::arch::x86_64::*;
    pub type Lanes = __m128;
    #[inline(always)]
    pub fn splat(v: f32) -> Lanes {
        unsafe { _mm_set1_ps(v) }
    }
    #[inline(always)]
    pub fn load(s: &[f32; 4]) -> Lanes {
        unsafe { _mm_loadu_ps(s.as_ptr()) }
    }
    /// `to` points at four writable f32 places (callers pass an array's pointer).
    #[inline(always)]
    pub fn store(v: Lanes, to: *mut f32) {
        unsafe { _mm_storeu_ps(to, v) }
    }
    #[inline(always)]
    pub fn add(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_add_ps(a, b) }
    }
    #[inline(always)]
    pub fn sub(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_sub_ps(a, b) }
    }
    #[inline(always)]
    pub fn mul(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_mul_ps(a, b) }
    }
    #[inline(always)]
    pub fn div(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_div_ps(a, b) }
    }
    /// MAXPS(b, a) is `b > a ? b : a`.
    #[inline(always)]
    pub fn max(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_max_ps(b, a) }
    }
    #[inline(always)]
    pub fn min(a: Lanes, b: Lanes) -> Lanes {
        unsafe { _mm_min_ps(b, a) }
    }
    #[inline(always)]
    pub fn abs(a: Lanes) -> Lanes {
        unsafe { _mm_andnot_ps(_mm_set1_ps(-0.0), a) }
    }
    #[inline(always)]
    pub fn binade(a: Lanes) -> Lanes {
        unsafe { _mm_and_ps(a, _mm_castsi128_ps(_mm_set1_epi32(super::EXPONENT_BITS as i32))) }
    }
    #[inline(always)]
    pub fn with_sign_of(a: Lanes, sign: Lanes) -> Lanes {
        unsafe {
            let bit = _mm_set1_ps(-0.0);
            _mm_or_ps(_mm_andnot_ps(bit, a), _mm_and_ps(bit, sign))
        }
    }
    #[inline(always)]
    pub fn above(a: Lanes, threshold: Lanes, then: Lanes, otherwise: Lanes) -> Lanes {
        unsafe {
            let mask = _mm_cmpgt_ps(a, threshold);
            _mm_or_ps(_mm_and_ps(mask, then), _mm_andnot_ps(mask, otherwise))
        }
    }
    #[inline(always)]
    pub fn swap_halves(a: Lanes) -> Lanes {
        unsafe { _mm_shuffle_ps::<0b01_00_11_10>(a, a) }
    }
    #[inline(always)]
    pub fn swap_pairs(a: Lanes) -> Lanes {
        unsafe { _mm_shuffle_ps::<0b10_11_00_01>(a, a) }
    }
    #[inline(always)]
    pub fn first(a: Lanes) -> f32 {
        unsafe { _mm_cvtss_f32(a) }
    }
}

#[cfg(all(target_arch = "wasm32", target_feature = "simd128"))]
mod imp {
    use core::arch::wasm32::*;
    pub type Lanes = v128;
    #[inline(always)]
    pub fn splat(v: f32) -> Lanes {
        f32x4_splat(v)
    }
    #[inline(always)]
    pub fn load(s: &[f32; 4]) -> Lanes {
        // SAFETY: a 16-byte unaligned read of exactly the four values of `s`.
        unsafe { v128_load(s.as_ptr().cast()) }
    }
    /// `to` points at four writable f32 places (callers pass an array's pointer).
    #[inline(always)]
    pub fn store(v: Lanes, to: *mut f32) {
        // SAFETY: a 16-byte unaligned write of exactly four places, as the callers guarantee.
        unsafe { v128_store(to.cast(), v) }
    }
    #[inline(always)]
    pub fn add(a: Lanes, b: Lanes) -> Lanes {
        f32x4_add(a, b)
    }
    #[inline(always)]
    pub fn sub(a: Lanes, b: Lanes) -> Lanes {
        f32x4_sub(a, b)
    }
    #[inline(always)]
    pub fn mul(a: Lanes, b: Lanes) -> Lanes {
        f32x4_mul(a, b)
    }
    #[inline(always)]
    pub fn div(a: Lanes, b: Lanes) -> Lanes {
        f32x4_div(a, b)
    }
    /// The "pseudo-maximum" `a < b ? b : a`, one instruction.
    #[inline(always)]
    pub fn max(a: Lanes, b: Lanes) -> Lanes {
        f32x4_pmax(a, b)
    }
    /// The "pseudo-minimum" `b < a ? b : a`.
    #[inline(always)]
    pub fn min(a: Lanes, b: Lanes) -> Lanes {
        f32x4_pmin(a, b)
    }
    #[inline(always)]
    pub fn abs(a: Lanes) -> Lanes {
        f32x4_abs(a)
    }
    #[inline(always)]
    pub fn binade(a: Lanes) -> Lanes {
        v128_and(a, u32x4_splat(super::EXPONENT_BITS))
    }
    #[inline(always)]
    pub fn with_sign_of(a: Lanes, sign: Lanes) -> Lanes {
        v128_bitselect(sign, a, f32x4_splat(-0.0))
    }
    #[inline(always)]
    pub fn above(a: Lanes, threshold: Lanes, then: Lanes, otherwise: Lanes) -> Lanes {
        v128_bitselect(then, otherwise, f32x4_gt(a, threshold))
    }
    #[inline(always)]
    pub fn swap_halves(a: Lanes) -> Lanes {
        i32x4_shuffle::<2, 3, 0, 1>(a, a)
    }
    #[inline(always)]
    pub fn swap_pairs(a: Lanes) -> Lanes {
        i32x4_shuffle::<1, 0, 3, 2>(a, a)
    }
    #[inline(always)]
    pub fn first(a: Lanes) -> f32 {
        f32x4_extract_lane::<0>(a)
    }
}

#[cfg(not(any(target_arch = "x86_64", all(target_arch = "wasm32", target_feature = "simd128"))))]
mod imp {
    pub type Lanes = [f32; 4];
    #[inline(always)]
    fn each(a: Lanes, b: Lanes, f: impl Fn(f32, f32) -> f32) -> Lanes {
        [f(a[0], b[0]), f(a[1], b[1]), f(a[2], b[2]), f(a[3], b[3])]
    }
    pub fn splat(v: f32) -> Lanes {
        [v; 4]
    }
    pub fn load(s: &[f32; 4]) -> Lanes {
        *s
    }
    /// `to` points at four writable f32 places (callers pass an array's pointer).
    pub fn store(v: Lanes, to: *mut f32) {
        // SAFETY: as the callers guarantee.
        unsafe { to.cast::<[f32; 4]>().write_unaligned(v) }
    }
    pub fn add(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| x + y)
    }
    pub fn sub(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| x - y)
    }
    pub fn mul(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| x * y)
    }
    pub fn div(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| x / y)
    }
    pub fn max(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| if y > x { y } else { x })
    }
    pub fn min(a: Lanes, b: Lanes) -> Lanes {
        each(a, b, |x, y| if y < x { y } else { x })
    }
    pub fn abs(a: Lanes) -> Lanes {
        a.map(f32::abs)
    }
    pub fn binade(a: Lanes) -> Lanes {
        a.map(|x| f32::from_bits(x.to_bits() & super::EXPONENT_BITS))
    }
    pub fn with_sign_of(a: Lanes, sign: Lanes) -> Lanes {
        each(a, sign, f32::copysign)
    }
    pub fn above(a: Lanes, threshold: Lanes, then: Lanes, otherwise: Lanes) -> Lanes {
        core::array::from_fn(|i| if a[i] > threshold[i] { then[i] } else { otherwise[i] })
    }
    pub fn swap_halves(a: Lanes) -> Lanes {
        [a[2], a[3], a[0], a[1]]
    }
    pub fn swap_pairs(a: Lanes) -> Lanes {
        [a[1], a[0], a[3], a[2]]
    }
    pub fn first(a: Lanes) -> f32 {
        a[0]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lanes_follow_scalar_arithmetic() {
        let a = [1.5f32, -2.0, 3.25, -0.0];
        let b = [0.5f32, 4.0, -3.25, 7.0];
        let (va, vb) = (F32x4::load(&a), F32x4::load(&b));
        let each = |f: fn(f32, f32) -> f32| [f(a[0], b[0]), f(a[1], b[1]), f(a[2], b[2]), f(a[3], b[3])];
        assert_eq!((va + vb).to_array(), each(|x, y| x + y));
        assert_eq!((va - vb).to_array(), each(|x, y| x - y));
        assert_eq!((va * vb).to_array(), each(|x, y| x * y));
        assert_eq!((va / vb).to_array(), each(|x, y| x / y));
        assert_eq!(va.max(vb).to_array(), each(|x, y| if y > x { y } else { x }));
        assert_eq!(va.min(vb).to_array(), each(|x, y| if y < x { y } else { x }));
        assert_eq!(va.abs().to_array(), a.map(f32::abs));
        // Binades of 1.5, −2, 3.25, −0: 1, 2, 2, 0 (with the sign bit cleared).
        assert_eq!(va.binade().to_array().map(f32::to_bits), [1.0f32, 2.0, 2.0, 0.0].map(f32::to_bits));
        assert_eq!(F32x4::splat(1e-40).binade().to_array(), [0.0; 4], "subnormals have binade 0");
        assert_eq!(va.with_sign_of(vb).to_array().map(f32::to_bits), each(f32::copysign).map(f32::to_bits));
        assert_eq!(va.above(vb, F32x4::splat(1.0), F32x4::splat(2.0)).to_array(), each(|x, y| if x > y { 1.0 } else { 2.0 }));
        assert_eq!(F32x4::splat(f32::NAN).above(vb, F32x4::splat(1.0), F32x4::splat(2.0)).to_array(), [2.0; 4], "NaN is above nothing");
        for lanes in [a, b, [3.0, 1.0, 2.0, 0.5], [0.5, 1.0, 2.0, 3.0], [-1.0, -4.0, -2.0, -3.0]] {
            let v = F32x4::load(&lanes);
            assert_eq!(v.max_lane(), lanes.into_iter().fold(f32::NEG_INFINITY, f32::max), "{lanes:?}");
            assert_eq!(v.min_lane(), lanes.into_iter().fold(f32::INFINITY, f32::min), "{lanes:?}");
        }
        for (x, y) in a.into_iter().zip(b).chain([(0.0, -0.0), (-0.0, 0.0), (1.0, 1.0)]) {
            assert_eq!(larger(x, y).to_bits(), (if y > x { y } else { x }).to_bits(), "larger({x}, {y})");
            assert_eq!(smaller(x, y).to_bits(), (if y < x { y } else { x }).to_bits(), "smaller({x}, {y})");
        }
        let mut out = [0f32; 4];
        F32x4::splat(2.5).store(&mut out);
        assert_eq!(out, [2.5; 4]);
    }
}
