//! Pure numerics over `&[f32]`: sums of squares, dot products, per-channel
//! reductions and the spread of per-sample values. No crate-internal imports.
//!
//! Kernels accumulate in eight `f32` lanes over short chunks and carry the
//! chunk sums in `f64`: one pass over the data, vectorisable, and accurate to
//! well below the 1e-4 relative agreement the reference checks ask for.
//!
//! The kernels a run measures with (`sum_sq`, `sums3`, `pair_sums`,
//! `range`, `range_channels`, `non_finite`, `rms`) take any [`Value`]: a
//! half-precision tensor is widened element by element as it is read, so it
//! is measured in one pass without a float32 copy, and the result is exactly
//! what the float32 kernel gives on the widened values (same operations in
//! the same order).

use serde::{Deserialize, Serialize};

const CHUNK: usize = 512;

/// An element the measuring kernels read: `f32` itself, or a narrower float
/// (half precision) that widens to `f32` exactly.
pub trait Value: Copy {
    /// The value as `f32` (exact for every implementor).
    fn f32(self) -> f32;
}

impl Value for f32 {
    #[inline(always)]
    fn f32(self) -> f32 {
        self
    }
}

/// Sum of squares of `x`, in `f64`.
pub fn sum_sq<T: Value>(x: &[T]) -> f64 {
    let mut total = 0f64;
    for chunk in x.chunks(CHUNK) {
        let mut lanes = [0f32; 8];
        let mut it = chunk.chunks_exact(8);
        for c in &mut it {
            for i in 0..8 {
                let v = c[i].f32();
                lanes[i] += v * v;
            }
        }
        let mut s: f64 = lanes.iter().map(|&v| v as f64).sum();
        s += it.remainder().iter().map(|&v| (v.f32() as f64) * (v.f32() as f64)).sum::<f64>();
        total += s;
    }
    total
}

/// Sums of squares of `a` and `b` and their dot product, in one pass.
pub fn sums3<A: Value, B: Value>(a: &[A], b: &[B]) -> (f64, f64, f64) {
    debug_assert_eq!(a.len(), b.len());
    let (mut ta, mut tb, mut tab) = (0f64, 0f64, 0f64);
    for (ca, cb) in a.chunks(CHUNK).zip(b.chunks(CHUNK)) {
        let mut la = [0f32; 8];
        let mut lb = [0f32; 8];
        let mut lab = [0f32; 8];
        let mut ia = ca.chunks_exact(8);
        let mut ib = cb.chunks_exact(8);
        for (x, y) in (&mut ia).zip(&mut ib) {
            for i in 0..8 {
                let (x, y) = (x[i].f32(), y[i].f32());
                la[i] += x * x;
                lb[i] += y * y;
                lab[i] += x * y;
            }
        }
        ta += la.iter().map(|&v| v as f64).sum::<f64>();
        tb += lb.iter().map(|&v| v as f64).sum::<f64>();
        tab += lab.iter().map(|&v| v as f64).sum::<f64>();
        for (&x, &y) in ia.remainder().iter().zip(ib.remainder()) {
            let (x, y) = (x.f32(), y.f32());
            ta += x as f64 * x as f64;
            tb += y as f64 * y as f64;
            tab += x as f64 * y as f64;
        }
    }
    (ta, tb, tab)
}

/// Sums of one pair of tensors of the same length, from one pass.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct PairSums {
    /// Σa².
    pub aa: f64,
    /// Σb².
    pub bb: f64,
    /// Σab.
    pub ab: f64,
    /// Largest |a| (NaN passed over).
    pub max_a: f32,
    /// Largest |b| (NaN passed over).
    pub max_b: f32,
}

impl PairSums {
    fn add(&mut self, o: &PairSums) {
        self.aa += o.aa;
        self.bb += o.bb;
        self.ab += o.ab;
        self.max_a = self.max_a.max(o.max_a);
        self.max_b = self.max_b.max(o.max_b);
    }
}

/// [`sums3`] and the largest |a| and |b|, in one pass.
pub fn pair_range<A: Value, B: Value>(a: &[A], b: &[B]) -> PairSums {
    debug_assert_eq!(a.len(), b.len());
    let mut out = PairSums::default();
    for (ca, cb) in a.chunks(CHUNK).zip(b.chunks(CHUNK)) {
        let mut la = [0f32; 8];
        let mut lb = [0f32; 8];
        let mut lab = [0f32; 8];
        let mut ma = [0f32; 8];
        let mut mb = [0f32; 8];
        let mut ia = ca.chunks_exact(8);
        let mut ib = cb.chunks_exact(8);
        for (x, y) in (&mut ia).zip(&mut ib) {
            for i in 0..8 {
                let (x, y) = (x[i].f32(), y[i].f32());
                la[i] += x * x;
                lb[i] += y * y;
                lab[i] += x * y;
                ma[i] = ma[i].max(x.abs());
                mb[i] = mb[i].max(y.abs());
            }
        }
        out.aa += la.iter().map(|&v| v as f64).sum::<f64>();
        out.bb += lb.iter().map(|&v| v as f64).sum::<f64>();
        out.ab += lab.iter().map(|&v| v as f64).sum::<f64>();
        out.max_a = ma.iter().fold(out.max_a, |m, &v| m.max(v));
        out.max_b = mb.iter().fold(out.max_b, |m, &v| m.max(v));
        for (&x, &y) in ia.remainder().iter().zip(ib.remainder()) {
            let (x, y) = (x.f32(), y.f32());
            out.aa += x as f64 * x as f64;
            out.bb += y as f64 * y as f64;
            out.ab += x as f64 * y as f64;
            out.max_a = out.max_a.max(x.abs());
            out.max_b = out.max_b.max(y.abs());
        }
    }
    out
}

/// [`pair_range`] of one sample laid out `[outer, channels, inner]`, adding
/// each channel's sums of squares to `ch_a` and `ch_b` (left alone when empty).
pub fn pair_sums<A: Value, B: Value>(
    a: &[A],
    b: &[B],
    inner: usize,
    ch_a: &mut [f64],
    ch_b: &mut [f64],
) -> PairSums {
    let channels = ch_a.len();
    if channels == 0 || inner == 0 || ch_b.len() != channels {
        return pair_range(a, b);
    }
    let mut out = PairSums::default();
    if inner >= 8 {
        for (i, (xa, xb)) in a.chunks(inner).zip(b.chunks(inner)).enumerate() {
            let s = pair_range(xa, xb);
            ch_a[i % channels] += s.aa;
            ch_b[i % channels] += s.bb;
            out.add(&s);
        }
        return out;
    }
    // Channels last (or nearly): accumulate element by element.
    for (i, (&x, &y)) in a.iter().zip(b).enumerate() {
        let c = (i / inner) % channels;
        let (x, y) = (x.f32(), y.f32());
        let (xd, yd) = (x as f64, y as f64);
        ch_a[c] += xd * xd;
        ch_b[c] += yd * yd;
        out.aa += xd * xd;
        out.bb += yd * yd;
        out.ab += xd * yd;
        out.max_a = out.max_a.max(x.abs());
        out.max_b = out.max_b.max(y.abs());
    }
    out
}

/// float16's smallest normal magnitude, 2^-14 (IEEE 754-2008 binary16).
pub const F16_MIN_NORMAL: f32 = 6.103_515_6e-5;
/// Half of float16's smallest subnormal, 2^-25: a magnitude at or below it
/// rounds to zero in float16 (round to nearest, ties to even).
pub const F16_FLUSH: f32 = 2.980_232_2e-8;

/// What one pass over a tensor (or one sample of it) measures besides its
/// sum of squares: what a ReLU would zero, the range, and what float16
/// would lose.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Range {
    /// Sum of squares, in `f64`.
    pub sum_sq: f64,
    /// Values that are not positive.
    pub not_positive: u64,
    /// Largest |x| (NaN values are passed over; an infinity is infinite).
    pub max_abs: f32,
    /// Nonzero values float16 rounds to zero: 0 < |x| ≤ 2^-25.
    pub f16_zero: u64,
    /// Values float16 keeps only as subnormals: 2^-25 < |x| < 2^-14.
    pub f16_subnormal: u64,
}

impl Range {
    fn add(&mut self, other: &Range) {
        self.sum_sq += other.sum_sq;
        self.not_positive += other.not_positive;
        self.max_abs = self.max_abs.max(other.max_abs);
        self.f16_zero += other.f16_zero;
        self.f16_subnormal += other.f16_subnormal;
    }
}

/// [`Range`] of `x` in one pass: the sum of squares (as [`sum_sq`] sums
/// it), the values that are not positive, the largest |x| and the values
/// float16 would flush to zero or keep as subnormals.
pub fn range<T: Value>(x: &[T]) -> Range {
    let mut out = Range::default();
    for chunk in x.chunks(CHUNK) {
        let mut lanes = [0f32; 8];
        let mut counts = [0u32; 8];
        let mut maxes = [0f32; 8];
        let mut zero = [0u32; 8];
        let mut sub = [0u32; 8];
        let mut it = chunk.chunks_exact(8);
        for c in &mut it {
            for i in 0..8 {
                let v = c[i].f32();
                let a = v.abs();
                lanes[i] += v * v;
                counts[i] += (v <= 0.0) as u32;
                maxes[i] = maxes[i].max(a);
                zero[i] += (a > 0.0 && a <= F16_FLUSH) as u32;
                sub[i] += (a > F16_FLUSH && a < F16_MIN_NORMAL) as u32;
            }
        }
        out.sum_sq += lanes.iter().map(|&v| v as f64).sum::<f64>();
        out.not_positive += counts.iter().map(|&c| c as u64).sum::<u64>();
        out.max_abs = maxes.iter().fold(out.max_abs, |m, &v| m.max(v));
        out.f16_zero += zero.iter().map(|&c| c as u64).sum::<u64>();
        out.f16_subnormal += sub.iter().map(|&c| c as u64).sum::<u64>();
        for v in it.remainder().iter().map(|v| v.f32()) {
            let a = v.abs();
            out.sum_sq += v as f64 * v as f64;
            out.not_positive += (v <= 0.0) as u64;
            out.max_abs = out.max_abs.max(a);
            out.f16_zero += (a > 0.0 && a <= F16_FLUSH) as u64;
            out.f16_subnormal += (a > F16_FLUSH && a < F16_MIN_NORMAL) as u64;
        }
    }
    out
}

/// [`range`] of one sample laid out `[outer, channels, inner]`, raising
/// each channel's largest |x| in `channel_max` (a plain [`range`] when it is
/// empty).
pub fn range_channels<T: Value>(x: &[T], inner: usize, channel_max: &mut [f32]) -> Range {
    let channels = channel_max.len();
    if channels == 0 || inner == 0 {
        return range(x);
    }
    let mut out = Range::default();
    if inner >= 8 {
        for (i, part) in x.chunks(inner).enumerate() {
            let r = range(part);
            let c = &mut channel_max[i % channels];
            *c = c.max(r.max_abs);
            out.add(&r);
        }
        return out;
    }
    // Channels last (or nearly): one row of channels at a time.
    let row = channels * inner;
    for part in x.chunks(row) {
        let r = range(part);
        out.add(&r);
        for (k, v) in part.iter().enumerate() {
            let c = &mut channel_max[k / inner];
            *c = c.max(v.f32().abs());
        }
    }
    out
}

/// The ratio of the largest to the median of per-channel maxima, and the
/// largest channel; `None` with fewer than two channels or a median of 0.
pub fn channel_outlier(channel_max: &[f64]) -> Option<(f64, usize)> {
    if channel_max.len() < 2 {
        return None;
    }
    let (top, &largest) = channel_max.iter().enumerate().max_by(|a, b| a.1.total_cmp(b.1))?;
    let mut sorted = channel_max.to_vec();
    sorted.sort_by(f64::total_cmp);
    let n = sorted.len();
    let median = if n % 2 == 1 { sorted[n / 2] } else { (sorted[n / 2 - 1] + sorted[n / 2]) / 2.0 };
    (median > 0.0).then(|| (largest / median, top))
}

/// Root mean square; 0 for an empty slice.
pub fn rms<T: Value>(x: &[T]) -> f64 {
    if x.is_empty() { 0.0 } else { (sum_sq(x) / x.len() as f64).sqrt() }
}

/// RMS of `b − a` over the common length, the differences taken in `f64`
/// (so two nearly equal tensors lose nothing to cancellation in `f32`).
pub fn rms_diff(a: &[f32], b: &[f32]) -> f64 {
    let n = a.len().min(b.len());
    if n == 0 {
        return 0.0;
    }
    let ss: f64 = a
        .iter()
        .zip(b)
        .map(|(&x, &y)| {
            let d = f64::from(y) - f64::from(x);
            d * d
        })
        .sum();
    (ss / n as f64).sqrt()
}

/// Number of NaN and infinite values.
pub fn non_finite<T: Value>(x: &[T]) -> (u64, u64) {
    let mut nan = 0;
    let mut inf = 0;
    for v in x.iter().map(|v| v.f32()) {
        if v.is_nan() {
            nan += 1;
        } else if v.is_infinite() {
            inf += 1;
        }
    }
    (nan, inf)
}

/// Mean, standard deviation, minimum and maximum of per-sample values.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Spread {
    /// Mean over samples.
    pub mean: f64,
    /// Standard deviation over samples (population, `n` in the denominator).
    pub std: f64,
    /// Smallest sample value.
    pub min: f64,
    /// Largest sample value.
    pub max: f64,
}

impl Spread {
    /// The spread of `values`; `None` when there are none or any is not finite.
    pub fn of(values: &[f64]) -> Option<Spread> {
        if values.is_empty() || values.iter().any(|v| !v.is_finite()) {
            return None;
        }
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let var = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
        Some(Spread {
            mean,
            std: var.sqrt(),
            min: values.iter().copied().fold(f64::INFINITY, f64::min),
            max: values.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        })
    }
}

/// How closely one output tensor follows a reference of the same length.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Agreement {
    /// `‖other − reference‖ / ‖reference‖`; 0 when both are zero, infinite when
    /// only the reference is zero.
    pub rel_l2: f64,
    /// Cosine similarity; `None` when either is all zeros.
    pub cosine: Option<f64>,
    /// Fraction of rows whose largest entry sits at the same index, when the
    /// tensors are rows of class scores (`classes` ≥ 2 divides the length).
    pub top1: Option<f64>,
}

/// Agreement of `other` with `reference`; `None` when the lengths differ or
/// the reference is empty. `classes` is the length of the last axis when the
/// output looks like class scores (`[batch, classes]`), else `None`.
pub fn agreement(reference: &[f32], other: &[f32], classes: Option<usize>) -> Option<Agreement> {
    if reference.len() != other.len() || reference.is_empty() {
        return None;
    }
    let (rr, oo, ro) = sums3(reference, other);
    // ‖a − b‖² = ‖a‖² + ‖b‖² − 2 a·b loses everything to cancellation when the
    // two are close, so the difference is summed directly.
    let diff: f64 = reference
        .iter()
        .zip(other)
        .map(|(&a, &b)| {
            let d = f64::from(a) - f64::from(b);
            d * d
        })
        .sum();
    let rel_l2 = if rr > 0.0 {
        (diff / rr).sqrt()
    } else if diff == 0.0 {
        0.0
    } else {
        f64::INFINITY
    };
    let cosine = (rr > 0.0 && oo > 0.0).then(|| (ro / (rr.sqrt() * oo.sqrt())).clamp(-1.0, 1.0));
    let top1 = classes.filter(|&c| c >= 2 && reference.len().is_multiple_of(c)).map(|c| {
        let rows = reference.len() / c;
        let same = reference
            .chunks(c)
            .zip(other.chunks(c))
            .filter(|(a, b)| argmax(a) == argmax(b))
            .count();
        same as f64 / rows as f64
    });
    Some(Agreement { rel_l2, cosine, top1 })
}

/// Index of the largest value (the first one on ties; NaN never wins).
fn argmax(x: &[f32]) -> Option<usize> {
    let mut best: Option<(usize, f32)> = None;
    for (i, &v) in x.iter().enumerate() {
        if v.is_nan() {
            continue;
        }
        if best.is_none_or(|(_, b)| v > b) {
            best = Some((i, v));
        }
    }
    best.map(|(i, _)| i)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A bfloat16 by its bits: widens by a shift, like a half-precision tensor.
    #[derive(Clone, Copy)]
    struct Bf(u16);

    impl Value for Bf {
        fn f32(self) -> f32 {
            f32::from_bits(u32::from(self.0) << 16)
        }
    }

    #[test]
    fn narrow_values_measure_exactly_as_their_widened_copy() {
        // 1,037 values (two chunks and a remainder), some not positive, one infinite.
        let narrow: Vec<Bf> = (0..1037u32)
            .map(|i| Bf((i.wrapping_mul(2_654_435_761) >> 16) as u16 & 0xbfff))
            .chain([Bf(0x7f80)])
            .collect();
        let wide: Vec<f32> = narrow.iter().map(|v| v.f32()).collect();
        let half = narrow.len() / 2;
        assert_eq!(sum_sq(&narrow).to_bits(), sum_sq(&wide).to_bits());
        assert_eq!(rms(&narrow[..half]).to_bits(), rms(&wide[..half]).to_bits());
        assert_eq!(range(&narrow), range(&wide));
        let (mut cn, mut cw) = (vec![0.0; 5], vec![0.0; 5]);
        assert_eq!(
            range_channels(&narrow[..1035], 9, &mut cn),
            range_channels(&wide[..1035], 9, &mut cw)
        );
        assert_eq!(cn, cw);
        assert_eq!(non_finite(&narrow), non_finite(&wide));
        let (a, b) = (&narrow[..half], &narrow[half..2 * half]);
        let (x, y) = (&wide[..half], &wide[half..2 * half]);
        assert_eq!(sums3(a, b), sums3(x, y));
        for inner in [1, 3, 37] {
            let channels = 7;
            let (mut ca, mut cb) = (vec![0.0; channels], vec![0.0; channels]);
            let (mut cx, mut cy) = (vec![0.0; channels], vec![0.0; channels]);
            let n = channels * inner * (half / (channels * inner));
            let s = pair_sums(&a[..n], &b[..n], inner, &mut ca, &mut cb);
            let t = pair_sums(&x[..n], &y[..n], inner, &mut cx, &mut cy);
            assert_eq!((s, ca, cb), (t, cx, cy));
        }
    }

    #[test]
    fn hand_computable_values() {
        let x = [3.0f32, 4.0];
        assert_eq!(sum_sq(&x), 25.0);
        assert!((rms(&x) - (12.5f64).sqrt()).abs() < 1e-12);
        assert_eq!(non_finite(&[1.0, f32::NAN, f32::INFINITY, -f32::INFINITY]), (1, 2));
    }

    #[test]
    fn long_inputs_match_a_plain_f64_sum() {
        let x: Vec<f32> = (0..10_007).map(|i| ((i * 7919) % 1000) as f32 / 1000.0 - 0.5).collect();
        let plain: f64 = x.iter().map(|&v| v as f64 * v as f64).sum();
        assert!((sum_sq(&x) - plain).abs() / plain < 1e-6);
        let y: Vec<f32> = x.iter().rev().copied().collect();
        let plain_dot: f64 = x.iter().zip(&y).map(|(&a, &b)| a as f64 * b as f64).sum();
        assert!((sums3(&x, &y).2 - plain_dot).abs() / plain_dot.abs() < 1e-5);
    }

    #[test]
    fn fused_sums_match_separate_ones() {
        let a: Vec<f32> = (0..1000).map(|i| (i as f32 * 0.37).sin()).collect();
        let b: Vec<f32> = (0..1000).map(|i| (i as f32 * 0.11).cos()).collect();
        let (sa, sb, sab) = sums3(&a, &b);
        assert!((sa - sum_sq(&a)).abs() < 1e-9 * sa);
        assert!((sb - sum_sq(&b)).abs() < 1e-9 * sb);
        let dot: f64 = a.iter().zip(&b).map(|(&x, &y)| x as f64 * y as f64).sum();
        assert!((sab - dot).abs() < 1e-6);
        // [C=4, inner=250] and [T=250, C=4] give the same totals as the flat sums.
        for inner in [250, 1] {
            let (mut ca, mut cb) = (vec![0.0; 4], vec![0.0; 4]);
            let PairSums { aa: ta, bb: tb, ab: tab, .. } =
                pair_sums(&a, &b, inner, &mut ca, &mut cb);
            // f32 lanes summed over other chunk boundaries: float32 rounding.
            assert!(
                (ta - sa).abs() < 1e-6 * sa
                    && (tb - sb).abs() < 1e-6 * sb
                    && (tab - sab).abs() < 1e-5
            );
            assert!((ca.iter().sum::<f64>() - sa).abs() < 1e-6 * sa);
        }
        let (mut ca, mut cb) = (vec![0.0; 2], vec![0.0; 2]);
        pair_sums(&[1.0, 1.0, 2.0, 2.0], &[0.0; 4], 1, &mut ca, &mut cb);
        assert_eq!(ca, vec![5.0, 5.0]);
        let r = range(&[-1.0f32, 0.0, 2.0]);
        assert_eq!((r.sum_sq, r.not_positive, r.max_abs), (5.0, 2, 2.0));
    }

    #[test]
    fn channels_first_and_last() {
        // [C=2, H*W=3]: channel 0 = 1,1,1; channel 1 = 2,2,2.
        let (mut out, mut zero) = (vec![0.0; 2], vec![0.0; 2]);
        pair_sums(&[1.0, 1.0, 1.0, 2.0, 2.0, 2.0], &[0.0; 6], 3, &mut out, &mut zero);
        assert_eq!(out, [3.0, 12.0]);
        // [T=3, C=2] channels last: inner = 1.
        let (mut out, mut zero) = (vec![0.0; 2], vec![0.0; 2]);
        pair_sums(&[1.0, 2.0, 1.0, 2.0, 1.0, 2.0], &[0.0; 6], 1, &mut out, &mut zero);
        assert_eq!(out, [3.0, 12.0]);
    }

    #[test]
    fn range_counts_what_float16_loses() {
        // 2^-25 rounds to 0 in float16 (a tie, to even); just above it is the
        // smallest subnormal; 2^-14 is the smallest normal.
        let tiny = F16_FLUSH;
        let x = [0.0f32, tiny, -tiny, tiny * 1.5, 1e-5, -F16_MIN_NORMAL, 3.0, -70000.0, f32::NAN];
        let r = range(&x);
        assert_eq!((r.f16_zero, r.f16_subnormal), (2, 2));
        assert_eq!(r.max_abs, 70000.0, "NaN is passed over");
        assert_eq!(F16_FLUSH, 2f32.powi(-25));
        assert_eq!(F16_MIN_NORMAL, 2f32.powi(-14));
        // Long inputs: the lanes agree with a plain loop.
        let long: Vec<f32> = (0..2051).map(|i| ((i * 7919) % 1000) as f32 * 1e-7 - 5e-5).collect();
        let r = range(&long);
        let plain_max = long.iter().fold(0f32, |m, v| m.max(v.abs()));
        let plain_sub =
            long.iter().filter(|v| v.abs() > F16_FLUSH && v.abs() < F16_MIN_NORMAL).count();
        assert_eq!((r.max_abs, r.f16_subnormal as usize), (plain_max, plain_sub));
        // Per channel, channels first and channels last.
        let mut ch = vec![0.0; 2];
        range_channels(&[1.0f32, -4.0, 1.0, 2.0, 2.0, 2.0], 3, &mut ch);
        assert_eq!(ch, [4.0, 2.0]);
        let mut ch = vec![0.0; 2];
        range_channels(&[1.0f32, 2.0, -4.0, 2.0, 1.0, 2.0], 1, &mut ch);
        assert_eq!(ch, [4.0, 2.0]);
        assert_eq!(channel_outlier(&[1.0, 2.0, 8.0]), Some((4.0, 2)));
        assert_eq!(channel_outlier(&[1.0, 3.0, 8.0, 2.0]), Some((3.2, 2)));
        assert_eq!(channel_outlier(&[1.0]), None);
        let p = pair_range(&[1.0f32, -3.0], &[0.5f32, 0.25]);
        assert_eq!((p.max_a, p.max_b, p.aa), (3.0, 0.5, 10.0));
    }

    #[test]
    fn spread_of_samples() {
        let s = Spread::of(&[1.0, 3.0]).unwrap();
        assert_eq!((s.mean, s.std, s.min, s.max), (2.0, 1.0, 1.0, 3.0));
        assert!(Spread::of(&[]).is_none());
        assert!(Spread::of(&[f64::NAN]).is_none());
    }

    #[test]
    fn agreement_of_outputs() {
        // Two rows of three class scores; the second row's winner moves.
        let a = [1.0, 2.0, 3.0, 3.0, 2.0, 1.0];
        let b = [1.0, 2.0, 3.5, 1.0, 2.0, 3.0];
        let g = agreement(&a, &b, Some(3)).unwrap();
        assert_eq!(g.top1, Some(0.5));
        // ‖a − b‖² = 0.25 + 4 + 4 = 8.25; ‖a‖² = 28.
        assert!((g.rel_l2 - (8.25f64 / 28.0).sqrt()).abs() < 1e-12);
        let same = agreement(&a, &a, None).unwrap();
        assert_eq!((same.rel_l2, same.top1), (0.0, None));
        assert!((same.cosine.unwrap() - 1.0).abs() < 1e-12);
        // A tiny change is not lost to cancellation.
        let c = [1.0, 2.0, 3.0, 3.0, 2.0, 1.0 + 1e-6];
        let tiny = agreement(&a, &c, None).unwrap().rel_l2;
        assert!((tiny / (1e-6 / 28f64.sqrt()) - 1.0).abs() < 0.05, "{tiny}");
        assert!(agreement(&a, &a[..3], None).is_none());
        assert_eq!(agreement(&[0.0], &[1.0], None).unwrap().rel_l2, f64::INFINITY);
    }
}
