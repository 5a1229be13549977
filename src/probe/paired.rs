//! Two models run pass by pass on the same inputs, for `compare`'s error
//! localisation: pass `p` of model A runs and keeps the merge tensors
//! (shortcut, branch, output) of its aligned blocks; pass `p` of model B
//! runs next, and as each of its aligned blocks completes, the difference
//! to A's tensors is summed and both are dropped.
//!
//! **Invariant:** besides what each run's own measurement holds, at most one
//! pass's merge tensors of A's aligned blocks are held (shared references to
//! tract's values), and B's only until its block is complete.

use tract_onnx::prelude::*;

use super::{
    BlockSamples, Held, Keep, ModelSource, ProbeResult, Progress, Role, Runner, Watch,
    collect_outputs, floats, inputs, prepare,
};
use crate::error::{Error, ErrorKind, Result};
use inputs::InputPlan;

/// Sums of the difference of one tensor of a block between A and B.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct ErrorSums {
    /// Σ(b − a)² over the values both hold as finite numbers, in `f64`.
    pub diff_sq: f64,
    /// Σa² over the same values.
    pub reference_sq: f64,
    /// Values compared.
    pub values: u64,
    /// Positions where A or B holds a NaN or an infinity.
    pub non_finite: u64,
    /// Passes whose tensors differ in length between A and B (not compared).
    pub mismatched: u64,
}

impl ErrorSums {
    fn add(&mut self, a: &[f32], b: &[f32]) {
        if a.len() != b.len() {
            self.mismatched += 1;
            return;
        }
        for (&x, &y) in a.iter().zip(b) {
            if !(x.is_finite() && y.is_finite()) {
                self.non_finite += 1;
                continue;
            }
            let (x, y) = (f64::from(x), f64::from(y));
            self.diff_sq += (y - x) * (y - x);
            self.reference_sq += x * x;
        }
        self.values += a.len() as u64;
    }

    /// `‖B − A‖ / ‖A‖` over the finite values; 0 when both are zero, `None`
    /// when nothing was compared or only A is zero.
    pub fn rel_l2(&self) -> Option<f64> {
        if self.values == 0 || self.mismatched > 0 {
            return None;
        }
        if self.reference_sq > 0.0 {
            Some((self.diff_sq / self.reference_sq).sqrt())
        } else if self.diff_sq == 0.0 {
            Some(0.0)
        } else {
            None
        }
    }
}

/// The differences of one aligned pair of blocks over all passes.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct PairErrors {
    /// The merge output.
    pub output: ErrorSums,
    /// The shortcut at the merge.
    pub shortcut: ErrorSums,
    /// The branch at the merge (its merge inputs summed).
    pub branch: ErrorSums,
}

/// The outcome of a paired run.
#[derive(Debug, Clone)]
pub struct PairedResult {
    /// A's run, measured as [`super::run`] measures it.
    pub a: ProbeResult,
    /// B's run.
    pub b: ProbeResult,
    /// One entry per pair, in the order given.
    pub errors: Vec<PairErrors>,
}

/// One side of a paired run.
pub struct Side<'a> {
    /// What tract reads.
    pub source: ModelSource<'a>,
    /// Its watches.
    pub watches: &'a [Watch],
    /// Its inputs; both plans must have the same passes.
    pub input_plan: &'a InputPlan,
}

/// Runs A and B pass by pass on their plans (which must split the samples
/// into the same passes) and measures both, and the difference of every
/// aligned pair `(block of A, block of B)` (0-based).
pub fn run_pair(
    a: Side<'_>,
    b: Side<'_>,
    pairs: &[(usize, usize)],
    progress: &dyn Progress,
) -> Result<PairedResult> {
    crate::parallel::guarded(|| run_pair_inner(a, b, pairs, progress), super::engine_panic)
}

fn run_pair_inner(
    a: Side<'_>,
    b: Side<'_>,
    pairs: &[(usize, usize)],
    progress: &dyn Progress,
) -> Result<PairedResult> {
    let (pa, pb) = (a.input_plan, b.input_plan);
    if pa.passes != pb.passes || pa.pass_batch != pb.pass_batch {
        return Err(Error::new(
            ErrorKind::Usage,
            format!(
                "the two runs split the samples differently ({} passes of {} against {} of {})",
                pa.passes, pa.pass_batch, pb.passes, pb.pass_batch
            ),
        ));
    }
    let prep_a = prepare(a.source, a.watches, pa, &[], progress)?;
    let prep_b = prepare(b.source, b.watches, pb, &[], progress)?;
    // The two models alternate pass by pass on one thread each (see
    // DEVELOPERS.md, "Error localisation").
    let mut runner_a = Runner::new(&prep_a, 1)?;
    let mut runner_b = Runner::new(&prep_b, 1)?;
    progress.step("running both", (pa.passes * 2) as u64);
    let mut acc_a = vec![BlockSamples::default(); a.watches.len()];
    let mut acc_b = vec![BlockSamples::default(); b.watches.len()];
    let mut out_a: Vec<Vec<f32>> = vec![Vec::new(); prep_a.n_outputs];
    let mut out_b: Vec<Vec<f32>> = vec![Vec::new(); prep_b.n_outputs];
    let (mut shapes_a, mut shapes_b) = (Vec::new(), Vec::new());
    let mut errors = vec![PairErrors::default(); pairs.len()];
    let mut pair_of_a: Vec<Option<usize>> = vec![None; a.watches.len()];
    let mut pair_of_b: Vec<Option<usize>> = vec![None; b.watches.len()];
    for (k, &(i, j)) in pairs.iter().enumerate() {
        pair_of_a[i] = Some(k);
        pair_of_b[j] = Some(k);
    }
    for pass in 0..pa.passes {
        let mut keep_a =
            HoldA { pair_of: &pair_of_a, held: a.watches.iter().map(Held::new).collect() };
        let values = inputs::values(pa, pass);
        let tensors = prep_a.tensors(pa, &values, &[])?;
        drop(values);
        let result =
            prep_a.measure(&mut runner_a, a.watches, pa, tensors, &mut acc_a, Some(&mut keep_a))?;
        shapes_a = collect_outputs(&result, &mut out_a);
        drop(result);
        progress.advance();
        let mut keep_b = CompareB {
            pairs,
            pair_of: &pair_of_b,
            a: &mut keep_a.held,
            now: b.watches.iter().map(Held::new).collect(),
            errors: &mut errors,
        };
        let values = inputs::values(pb, pass);
        let tensors = prep_b.tensors(pb, &values, &[])?;
        drop(values);
        let result =
            prep_b.measure(&mut runner_b, b.watches, pb, tensors, &mut acc_b, Some(&mut keep_b))?;
        shapes_b = collect_outputs(&result, &mut out_b);
        progress.advance();
    }
    progress.finish();
    Ok(PairedResult {
        a: ProbeResult { blocks: acc_a, outputs: out_a, output_shapes: shapes_a },
        b: ProbeResult { blocks: acc_b, outputs: out_b, output_shapes: shapes_b },
        errors,
    })
}

/// Keeps the merge tensors of A's aligned blocks for one pass.
struct HoldA<'a> {
    pair_of: &'a [Option<usize>],
    held: Vec<Held>,
}

impl Keep for HoldA<'_> {
    fn keep(&mut self, b: usize, role: Role, value: &TValue) -> Result<()> {
        if self.pair_of[b].is_some() && !matches!(role, Role::Fork) {
            self.held[b].keep(role, value);
        }
        Ok(())
    }
}

/// Compares each of B's aligned blocks with A's as soon as it is complete.
struct CompareB<'a> {
    pairs: &'a [(usize, usize)],
    pair_of: &'a [Option<usize>],
    a: &'a mut [Held],
    now: Vec<Held>,
    errors: &'a mut [PairErrors],
}

impl Keep for CompareB<'_> {
    fn keep(&mut self, b: usize, role: Role, value: &TValue) -> Result<()> {
        let Some(k) = self.pair_of[b] else { return Ok(()) };
        if matches!(role, Role::Fork) {
            return Ok(());
        }
        self.now[b].keep(role, value);
        let i = self.pairs[k].0;
        if !merge_complete(&self.now[b]) || !merge_complete(&self.a[i]) {
            return Ok(());
        }
        let (x, y) = (&self.a[i], &self.now[b]);
        let e = &mut self.errors[k];
        add_pair(&mut e.output, x.output.as_ref(), y.output.as_ref())?;
        add_pair(&mut e.shortcut, x.shortcut.as_ref(), y.shortcut.as_ref())?;
        let (bx, by) = (branch_sum(&x.branch)?, branch_sum(&y.branch)?);
        match (bx, by) {
            (Some(bx), Some(by)) => e.branch.add(&bx, &by),
            _ => e.branch.mismatched += 1,
        }
        self.a[i] = Held { branch: vec![None; self.a[i].branch.len()], ..Held::default() };
        self.now[b] = Held { branch: vec![None; self.now[b].branch.len()], ..Held::default() };
        Ok(())
    }
}

fn merge_complete(h: &Held) -> bool {
    h.shortcut.is_some() && h.output.is_some() && h.branch.iter().all(Option::is_some)
}

fn add_pair(sums: &mut ErrorSums, a: Option<&TValue>, b: Option<&TValue>) -> Result<()> {
    let (Some(a), Some(b)) = (a, b) else { return Ok(()) };
    let (_, x) = floats(a)?;
    let (_, y) = floats(b)?;
    sums.add(&x, &y);
    Ok(())
}

/// The branch at the merge as float32: its one input, or the sum of
/// several of the same length (`None` when their lengths differ).
fn branch_sum(branch: &[Option<TValue>]) -> Result<Option<Vec<f32>>> {
    let mut sum: Option<Vec<f32>> = None;
    for t in branch.iter().flatten() {
        let (_, x) = floats(t)?;
        match sum.as_mut() {
            None => sum = Some(x.into_owned()),
            Some(s) if s.len() == x.len() => {
                for (a, b) in s.iter_mut().zip(x.iter()) {
                    *a += b;
                }
            }
            Some(_) => return Ok(None),
        }
    }
    Ok(sum)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_error_over_finite_values() {
        let mut e = ErrorSums::default();
        e.add(&[3.0, 4.0, f32::INFINITY], &[3.0, 5.0, 1.0]);
        // ‖b − a‖² = 1 over the finite pairs; ‖a‖² = 25.
        assert_eq!(e.rel_l2(), Some(0.2));
        assert_eq!((e.non_finite, e.values), (1, 3));
        e.add(&[1.0], &[1.0, 2.0]);
        assert_eq!(e.rel_l2(), None, "a pass of another length is not compared");
        let mut zero = ErrorSums::default();
        zero.add(&[0.0], &[0.0]);
        assert_eq!(zero.rel_l2(), Some(0.0));
    }
}
