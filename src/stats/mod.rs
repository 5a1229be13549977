//! Pure numerics over `&[f32]`: sums of squares, dot products, per-channel
//! reductions and the spread of per-sample values. No crate-internal imports.
//!
//! Kernels accumulate in eight `f32` lanes over short chunks and carry the
//! chunk sums in `f64`: one pass over the data, vectorisable, and accurate to
//! well below the 1e-4 relative agreement the reference checks ask for.

use serde::{Deserialize, Serialize};

const CHUNK: usize = 512;

/// Sum of squares of `x`, in `f64`.
pub fn sum_sq(x: &[f32]) -> f64 {
    let mut total = 0f64;
    for chunk in x.chunks(CHUNK) {
        let mut lanes = [0f32; 8];
        let mut it = chunk.chunks_exact(8);
        for c in &mut it {
            for i in 0..8 {
                lanes[i] += c[i] * c[i];
            }
        }
        let mut s: f64 = lanes.iter().map(|&v| v as f64).sum();
        s += it.remainder().iter().map(|&v| (v as f64) * (v as f64)).sum::<f64>();
        total += s;
    }
    total
}

/// Dot product of two slices of equal length, in `f64`.
pub fn dot(a: &[f32], b: &[f32]) -> f64 {
    debug_assert_eq!(a.len(), b.len());
    let mut total = 0f64;
    for (ca, cb) in a.chunks(CHUNK).zip(b.chunks(CHUNK)) {
        let mut lanes = [0f32; 8];
        let mut ia = ca.chunks_exact(8);
        let mut ib = cb.chunks_exact(8);
        for (x, y) in (&mut ia).zip(&mut ib) {
            for i in 0..8 {
                lanes[i] += x[i] * y[i];
            }
        }
        let mut s: f64 = lanes.iter().map(|&v| v as f64).sum();
        s += ia
            .remainder()
            .iter()
            .zip(ib.remainder())
            .map(|(&x, &y)| x as f64 * y as f64)
            .sum::<f64>();
        total += s;
    }
    total
}

/// Root mean square; 0 for an empty slice.
pub fn rms(x: &[f32]) -> f64 {
    if x.is_empty() { 0.0 } else { (sum_sq(x) / x.len() as f64).sqrt() }
}

/// Cosine similarity; `None` when either vector is zero or the lengths differ.
pub fn cosine(a: &[f32], b: &[f32]) -> Option<f64> {
    if a.len() != b.len() {
        return None;
    }
    let (na, nb) = (sum_sq(a), sum_sq(b));
    if na == 0.0 || nb == 0.0 {
        return None;
    }
    Some((dot(a, b) / (na.sqrt() * nb.sqrt())).clamp(-1.0, 1.0))
}

/// Number of NaN and infinite values.
pub fn non_finite(x: &[f32]) -> (u64, u64) {
    let mut nan = 0;
    let mut inf = 0;
    for &v in x {
        if v.is_nan() {
            nan += 1;
        } else if v.is_infinite() {
            inf += 1;
        }
    }
    (nan, inf)
}

/// Fraction of values that are not positive (what a ReLU sets to zero).
pub fn fraction_not_positive(x: &[f32]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    x.iter().filter(|&&v| v <= 0.0).count() as f64 / x.len() as f64
}

/// Sum of squares per channel of one sample laid out as `[outer, channels,
/// inner]` in row-major order (`outer` = 1 for `[C, H, W]` with the channel
/// first; `inner` = 1 for `[T, C]` with the channel last).
pub fn channel_sum_sq(x: &[f32], channels: usize, inner: usize, out: &mut [f64]) {
    debug_assert_eq!(out.len(), channels);
    if channels == 0 || inner == 0 {
        return;
    }
    for (i, block) in x.chunks(inner).enumerate() {
        out[i % channels] += sum_sq(block);
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hand_computable_values() {
        let x = [3.0f32, 4.0];
        assert_eq!(sum_sq(&x), 25.0);
        assert!((rms(&x) - (12.5f64).sqrt()).abs() < 1e-12);
        assert_eq!(dot(&[1.0, 2.0, 3.0], &[4.0, 5.0, 6.0]), 32.0);
        assert_eq!(cosine(&[1.0, 0.0], &[0.0, 1.0]), Some(0.0));
        assert!((cosine(&[1.0, 2.0], &[2.0, 4.0]).unwrap() - 1.0).abs() < 1e-12);
        assert_eq!(cosine(&[0.0, 0.0], &[1.0, 1.0]), None);
        assert_eq!(non_finite(&[1.0, f32::NAN, f32::INFINITY, -f32::INFINITY]), (1, 2));
        assert_eq!(fraction_not_positive(&[-1.0, 0.0, 1.0, 2.0]), 0.5);
    }

    #[test]
    fn long_inputs_match_a_plain_f64_sum() {
        let x: Vec<f32> = (0..10_007).map(|i| ((i * 7919) % 1000) as f32 / 1000.0 - 0.5).collect();
        let plain: f64 = x.iter().map(|&v| v as f64 * v as f64).sum();
        assert!((sum_sq(&x) - plain).abs() / plain < 1e-6);
        let y: Vec<f32> = x.iter().rev().copied().collect();
        let plain_dot: f64 = x.iter().zip(&y).map(|(&a, &b)| a as f64 * b as f64).sum();
        assert!((dot(&x, &y) - plain_dot).abs() / plain_dot.abs() < 1e-5);
    }

    #[test]
    fn channels_first_and_last() {
        // [C=2, H*W=3]: channel 0 = 1,1,1; channel 1 = 2,2,2.
        let mut out = [0.0; 2];
        channel_sum_sq(&[1.0, 1.0, 1.0, 2.0, 2.0, 2.0], 2, 3, &mut out);
        assert_eq!(out, [3.0, 12.0]);
        // [T=3, C=2] channels last: inner = 1.
        let mut out = [0.0; 2];
        channel_sum_sq(&[1.0, 2.0, 1.0, 2.0, 1.0, 2.0], 2, 1, &mut out);
        assert_eq!(out, [3.0, 12.0]);
    }

    #[test]
    fn spread_of_samples() {
        let s = Spread::of(&[1.0, 3.0]).unwrap();
        assert_eq!((s.mean, s.std, s.min, s.max), (2.0, 1.0, 1.0, 3.0));
        assert!(Spread::of(&[]).is_none());
        assert!(Spread::of(&[f64::NAN]).is_none());
    }
}
