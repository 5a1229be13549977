//! `shunt audit --knockout` / `--gain`: branch knockout, perturbation gain
//! and effective depth against exact answers, published facts and theory.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

use shunt::audit::{self, AuditConfig};
use shunt::load::ExternalData;
use shunt::measure::InfluenceConfig;
use shunt::probe::Silent;
use shunt::probe::inputs::{self, Values};
use shunt::proto::ModelProto;
use shunt::report::{InfluenceReport, Report};
use shunt_testkit::builder::{Dim, Init, ModelBuilder};

use crate::util::{fixture, shunt};

fn config(samples: usize, influence: InfluenceConfig) -> AuditConfig {
    let mut c = AuditConfig::standard();
    c.inputs.samples = samples;
    c.inputs.seed = 5;
    c.influence = Some(influence);
    c
}

fn audit_with(model: ModelProto, c: &AuditConfig) -> audit::Audit {
    let a = audit::audit_model(model, "in-memory", c, &Silent).expect("the audit runs");
    assert!(a.run_error.is_none(), "{:?}", a.run_error);
    a
}

fn load(name: &str) -> ModelProto {
    shunt::load::load(&fixture(name), &shunt::load::LoadConfig { max_file_bytes: 1 << 30 })
        .expect("the fixture loads")
        .model
}

fn influence(r: &Report) -> &InfluenceReport {
    r.influence.as_ref().expect("an influence section")
}

// The gates are exact: x * 1.0 == x in IEEE arithmetic, so the gated model
// with every gate at 1 must give the original's outputs and per-block
// measurements (the optimiser sees different graphs, so we allow a few ulps
// in case it regroups a sum; in practice they are bit-identical).
#[test]
fn gated_model_with_gates_at_one_matches_the_original() {
    // Residual blocks: fixtures/MANIFEST.txt (additive=).
    for (name, count) in
        [("resnet18_b.onnx", 8), ("convnext_like.onnx", 18), ("text_prenorm_decomposed.onnx", 4)]
    {
        let model = load(name);
        let mut plain = AuditConfig::standard();
        plain.inputs.samples = 3;
        let mut gated = config(3, InfluenceConfig::standard());
        gated.inputs.seed = plain.inputs.seed;
        let a = audit_with(model.clone(), &plain);
        let b = audit_with(model, &gated);
        assert_eq!(a.outputs.len(), b.outputs.len(), "{name}");
        for (x, y) in a.outputs.iter().zip(&b.outputs) {
            assert_eq!(x.len(), y.len());
            for (p, q) in x.iter().zip(y) {
                let ulp = f32::EPSILON * p.abs().max(q.abs()).max(f32::MIN_POSITIVE);
                assert!((p - q).abs() <= 4.0 * ulp, "{name}: {p} vs {q}");
            }
        }
        assert_eq!((a.report.blocks.len(), b.report.blocks.len()), (count, count), "{name}");
        for (x, y) in a.report.blocks.iter().zip(&b.report.blocks) {
            let (sx, sy) = (x.stats.as_ref().unwrap(), y.stats.as_ref().unwrap());
            let (rx, ry) = (sx.ratio.unwrap().mean, sy.ratio.unwrap().mean);
            assert!((rx - ry).abs() <= 1e-6 * rx.abs(), "{name} block {}: {rx} vs {ry}", x.id);
        }
        // And the gates are live, not folded: every knockout changes something
        // in these models, whose branches are all non-zero.
        let inf = influence(&b.report);
        assert!(inf.blocks.iter().all(|r| r.knockout.unwrap().rel_l2 > 0.0), "{name}");
    }
}

// [Z1] ReZero is All You Need, arXiv:2003.04887: x + alpha * F(x) with alpha
// initialised to 0, so every branch is exactly zero at initialisation. With the
// branch removed the merge computes x + 0 exactly as before: the outputs are
// bit-identical and the relative change is exactly 0. zero_branch.onnx zeroes
// the last convolution instead of a scalar gate; the same holds.
#[test]
fn knockout_of_a_zero_branch_changes_nothing() {
    for name in ["rezero.onnx", "zero_branch.onnx"] {
        let a = audit_with(load(name), &config(4, InfluenceConfig::standard()));
        let inf = influence(&a.report);
        assert_eq!(inf.blocks.len(), 3);
        for row in &inf.blocks {
            let k = row.knockout.expect("knocked out");
            assert_eq!(k.rel_l2, 0.0, "{name} block {}", row.block);
            assert_eq!(k.top1, Some(1.0));
            assert!(row.low_impact);
        }
        let low = a.report.findings.iter().filter(|f| f.code.as_str() == "low-impact").count();
        assert_eq!(low, 3, "{name}");
    }
}

// [C1] A ConvNet for the 2020s, arXiv:2201.03545: each branch ends in a
// per-channel layer scale initialised to 1e-6, so a branch is about 1e-6 of
// its shortcut. Removing it changes the merge output by that branch alone,
// i.e. by the measured RMS(branch)/RMS(shortcut) relative, and the rest of
// the (randomly initialised, near-identity) network passes the change on
// with a gain of order 1 (measured: between 0.3 and 3 here). So the outputs
// change by about 1e-6 relative: we require every block within [1e-7, 1e-5]
// and the relative change within a factor 4 of the block's own ratio.
#[test]
fn knockout_of_a_layer_scale_branch_changes_about_one_millionth() {
    let a = audit_with(load("convnext_like.onnx"), &config(4, InfluenceConfig::standard()));
    let inf = influence(&a.report);
    assert_eq!(inf.blocks.len(), 18);
    for (row, b) in inf.blocks.iter().zip(&a.report.blocks) {
        let k = row.knockout.unwrap().rel_l2;
        let ratio = b.stats.as_ref().unwrap().ratio.unwrap().mean;
        assert!((1e-7..1e-5).contains(&k), "block {}: {k}", row.block);
        assert!(k / ratio > 0.25 && k / ratio < 4.0, "block {}: {k} vs ratio {ratio}", row.block);
        assert_eq!(row.knockout.unwrap().top1, Some(1.0));
    }
}

/// `x_{l+1} = x_l + W_l x_l` on `[N, width]`, with the weights returned.
fn linear_stack(blocks: usize, width: usize, seed: u64) -> (ModelProto, Vec<Vec<f64>>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut b = ModelBuilder::new("linear_stack", 17).seed(seed);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(width as i64)]);
    let mut weights = Vec::new();
    for i in 0..blocks {
        let std = 0.6 / (width as f32).sqrt();
        let w: Vec<f32> =
            (0..width * width).map(|_| rng.sample::<f32, _>(StandardNormal) * std).collect();
        weights.push(w.iter().map(|&v| f64::from(v)).collect());
        let h = b.gemm(&format!("b{i}.fc"), &x, width as i64, &Init::Values(w));
        x = b.add(&format!("b{i}.add"), &x, &h);
    }
    b.output(&x);
    (b.finish(), weights)
}

/// `(I + W) d` for a `[out, in]` weight matrix stored row-major.
fn step(w: &[f64], d: &[f64]) -> Vec<f64> {
    let n = d.len();
    (0..n).map(|i| d[i] + (0..n).map(|j| w[i * n + j] * d[j]).sum::<f64>()).collect()
}

fn norm(v: &[f64]) -> f64 {
    v.iter().map(|x| x * x).sum::<f64>().sqrt()
}

/// Per-block gains and end-to-end gains of a linear stack computed from its
/// weights along the exact input change the audit feeds (analytic Jacobian
/// `Π (I + W_l)` applied to the direction), each averaged over samples.
fn analytic_gains(
    model: &ModelProto,
    weights: &[Vec<f64>],
    c: &AuditConfig,
    step_size: f32,
) -> (Vec<f64>, Vec<f64>) {
    let analysis =
        shunt::open::analyse(model.clone(), ExternalData::none(), &c.open).expect("analyses");
    let input_plan = inputs::plan(&inputs::input_specs(&analysis.graph), &c.inputs).unwrap();
    let width = (weights[0].len() as f64).sqrt() as usize;
    let (mut per_block, mut to_here) = (vec![0.0; weights.len()], vec![0.0; weights.len()]);
    let mut count = 0.0;
    for pass in 0..input_plan.passes {
        let values = inputs::values(&input_plan, pass);
        let moved = inputs::perturbed(&input_plan, pass, &values, step_size);
        let (Values::F32(x), Values::F32(y)) = (&values[0], &moved[0]) else { panic!("floats") };
        for (xs, ys) in x.chunks(width).zip(y.chunks(width)) {
            let d0: Vec<f64> =
                xs.iter().zip(ys).map(|(a, b)| f64::from(*b) - f64::from(*a)).collect();
            let mut d = d0.clone();
            for (l, w) in weights.iter().enumerate() {
                let next = step(w, &d);
                per_block[l] += norm(&next) / norm(&d);
                to_here[l] += norm(&next) / norm(&d0);
                d = next;
            }
            count += 1.0;
        }
    }
    (per_block.iter().map(|g| g / count).collect(), to_here.iter().map(|g| g / count).collect())
}

fn measured_gains(r: &Report) -> (Vec<f64>, Vec<f64>) {
    let inf = influence(r);
    (
        inf.blocks.iter().map(|b| b.gain.unwrap().mean).collect(),
        inf.blocks.iter().map(|b| b.gain_to_here.unwrap()).collect(),
    )
}

fn worst_relative_error(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| ((x - y) / y).abs()).fold(0.0, f64::max)
}

// The gain of a purely linear residual stack is the norm of its Jacobian
// Π (I + W_l) along the input change, computed here in f64 from the weights
// the test itself drew (no reference to the tool's arithmetic). float32
// tolerance: the two passes' roundings differ by about c·u·|x| per value
// (u = 2^-24 ≈ 6e-8, c a few ops per block), against a change of step·|x|;
// with the default step 1e-3 and 6 blocks that is a few 1e-4 relative, so
// we require 1e-3 (the values agree to ~1e-5 in practice).
#[test]
fn gain_of_a_linear_stack_is_its_jacobian_norm_along_the_direction() {
    let (model, weights) = linear_stack(6, 32, 21);
    let mut ic = InfluenceConfig::standard();
    ic.knockout = false;
    let c = config(8, ic);
    let a = audit_with(model.clone(), &c);
    let (per_block, to_here) = measured_gains(&a.report);
    let (want_block, want_here) = analytic_gains(&model, &weights, &c, shunt::measure::GAIN_STEP);
    assert!(
        worst_relative_error(&per_block, &want_block) < 1e-3,
        "{per_block:?} vs {want_block:?}"
    );
    assert!(worst_relative_error(&to_here, &want_here) < 1e-3, "{to_here:?} vs {want_here:?}");
    let e2e = influence(&a.report).gain.as_ref().unwrap().end_to_end.unwrap();
    assert!((e2e - want_here[5]).abs() < 1e-3 * want_here[5]);
}

// The step-size reasoning of `shunt::measure::GAIN_STEP`, shown on the same linear
// stack where the exact answer is known: the error is about c·u/step, so at
// the default step it is far below 1e-3, while a step of 1e-7 (about one
// float32 spacing of the inputs) lets rounding dominate the measurement.
#[test]
fn gain_step_keeps_float32_rounding_small() {
    let (model, weights) = linear_stack(6, 32, 21);
    let error_at = |step_size: f32| {
        let mut ic = InfluenceConfig::standard();
        ic.knockout = false;
        ic.gain_step = Some(step_size);
        let c = config(8, ic);
        let a = audit_with(model.clone(), &c);
        let (per_block, _) = measured_gains(&a.report);
        let (want, _) = analytic_gains(&model, &weights, &c, step_size);
        worst_relative_error(&per_block, &want)
    };
    let good = error_at(shunt::measure::GAIN_STEP);
    let tiny = error_at(1e-7);
    assert!(good < 1e-3, "default step: {good}");
    assert!(tiny > 1e-2, "step 1e-7 should be dominated by rounding: {tiny}");
    assert!(tiny > 30.0 * good);
}

// [S1] Delving Deep into Rectifiers, arXiv:1502.01852, Section 2.2. Derivation
// for the change d of a block input x in relu -> W1 -> relu -> W2 with weight
// variance 2/fan_in: the branch's Jacobian is W2 D2 W1 D1 with D the ReLU
// masks; D1 keeps about half of d's second moment, W1 doubles it, D2 halves,
// W2 doubles, so ‖J_F d‖ ≈ ‖d‖, and J_F d is uncorrelated with d in
// expectation: ‖d + J_F d‖² ≈ 2‖d‖², a gain of sqrt(2) per block.
// Tolerances: on the wide stack (1024 features, 8 blocks, 32 samples) one
// draw deviates by about sqrt(2/1024) ≈ 4% in second moment, 2% in the gain:
// 3% on the average. The committed fixture has 4-channel 3x3 convolutions
// (fan_in 36, zero padding at the borders of 32x32 maps), whose one draw
// deviates far more: 10% on the average of its 4 blocks.
#[test]
fn he_initialised_preact_blocks_have_gain_sqrt2() {
    let mut b = ModelBuilder::new("preact_mlp", 17).seed(11);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(1024)]);
    for i in 0..8 {
        let a = b.relu(&format!("b{i}.relu1"), &x);
        let h = b.gemm(&format!("b{i}.fc1"), &a, 1024, &Init::HeNormal);
        let h = b.relu(&format!("b{i}.relu2"), &h);
        let f = b.gemm(&format!("b{i}.fc2"), &h, 1024, &Init::HeNormal);
        x = b.add(&format!("b{i}.add"), &x, &f);
    }
    b.output(&x);
    let mut ic = InfluenceConfig::standard();
    ic.knockout = false;
    let a = audit_with(b.finish(), &config(32, ic));
    assert_eq!(influence(&a.report).blocks.len(), 8, "the 8 blocks built above");
    let gains = measured_gains(&a.report).0;
    let mean = gains.iter().sum::<f64>() / gains.len() as f64;
    assert!((mean / 2f64.sqrt() - 1.0).abs() < 0.03, "{gains:?}");
    for g in &gains {
        assert!((g / 2f64.sqrt() - 1.0).abs() < 0.1, "{gains:?}");
    }
    // The branch and the shortcut carry the change about equally.
    for row in &influence(&a.report).blocks {
        let share = row.branch_share.unwrap();
        assert!((share - 0.5).abs() < 0.05, "{share}");
    }

    let a = audit_with(load("preact_nonorm.onnx"), &config(8, InfluenceConfig::standard()));
    let gains = measured_gains(&a.report).0;
    let mean = gains.iter().sum::<f64>() / gains.len() as f64;
    assert!((mean / 2f64.sqrt() - 1.0).abs() < 0.1, "{gains:?}");
}

#[test]
fn exploding_gain_is_a_finding_with_fail_on() {
    // 16 He-initialised pre-activation blocks: the gain grows about
    // sqrt(2)^16 = 256-fold, past the default factor 100.
    let mut b = ModelBuilder::new("deep_preact", 17).seed(3);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(256)]);
    for i in 0..16 {
        let a = b.relu(&format!("b{i}.relu1"), &x);
        let h = b.gemm(&format!("b{i}.fc1"), &a, 256, &Init::HeNormal);
        let h = b.relu(&format!("b{i}.relu2"), &h);
        let f = b.gemm(&format!("b{i}.fc2"), &h, 256, &Init::HeNormal);
        x = b.add(&format!("b{i}.add"), &x, &f);
    }
    b.output(&x);
    let dir = crate::util::tempdir();
    let path = dir.path().join("deep.onnx");
    std::fs::write(&path, prost::Message::encode_to_vec(&b.finish())).unwrap();
    let p = path.to_str().unwrap();
    let run = shunt(&["audit", p, "--gain", "-q", "--fail-on", "exploding-gain"]);
    assert_eq!(run.code, 1, "{}{}", run.stdout, run.stderr);
    assert!(run.stdout.contains("exploding-gain"), "{}", run.stdout);
    let run =
        shunt(&["audit", p, "--gain", "-q", "--gain-factor", "1e6", "--fail-on", "exploding-gain"]);
    assert_eq!(run.code, 0, "{}{}", run.stdout, run.stderr);
}

#[test]
fn blocks_selection_costs_one_pass_per_selected_block() {
    let f = fixture("resnet18_b.onnx");
    let run = shunt(&[
        "audit",
        f.to_str().unwrap(),
        "--knockout",
        "--blocks",
        "2,5-6",
        "--batch",
        "2",
        "-q",
        "--format",
        "json",
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(r.schema_version, 5);
    let inf = influence(&r);
    let k = inf.knockout.as_ref().unwrap();
    assert_eq!(k.blocks, vec![2, 5, 6]);
    // One intact pass, one perturbed pass, one pass per knocked-out block.
    assert_eq!(k.forward_passes, 2 + 3);
    let knocked: Vec<usize> =
        inf.blocks.iter().filter(|b| b.knockout.is_some()).map(|b| b.block).collect();
    assert_eq!(knocked, vec![2, 5, 6]);
    let mut ranks: Vec<usize> = inf.blocks.iter().filter_map(|b| b.rank).collect();
    ranks.sort_unstable();
    assert_eq!(ranks, vec![1, 2, 3]);
    // Stage changes (stride 2 in stages 2-4) are marked: blocks 3, 5 and 7 [R1].
    let resizing: Vec<usize> =
        inf.blocks.iter().filter(|b| b.changes_resolution).map(|b| b.block).collect();
    assert_eq!(resizing, vec![3, 5, 7]);

    let bad = shunt(&["audit", f.to_str().unwrap(), "--knockout", "--blocks", "2,99", "-q"]);
    assert_eq!(bad.code, 2);
    assert!(bad.stderr.contains("no block #99"), "{}", bad.stderr);
    let bad = shunt(&["audit", f.to_str().unwrap(), "--blocks", "2", "-q"]);
    assert_eq!(bad.code, 2);
    let bad = shunt(&["audit", f.to_str().unwrap(), "--knockout", "--blocks", "3-1", "-q"]);
    assert_eq!(bad.code, 2);
}

#[test]
fn converse_knockout_removes_the_shortcut() {
    let mut ic = InfluenceConfig::standard();
    ic.shortcuts = true;
    let a = audit_with(load("rezero.onnx"), &config(2, ic));
    let inf = influence(&a.report);
    assert_eq!(inf.knockout.as_ref().unwrap().forward_passes, 2 + 3 + 3);
    // fixtures/MANIFEST.txt: rezero.onnx additive=3.
    assert_eq!(inf.blocks.len(), 3);
    for row in &inf.blocks {
        // With a zero branch, removing the shortcut leaves nothing of the
        // block's input: the outputs change completely.
        let k = row.shortcut_knockout.expect("converse measured");
        assert!(k.rel_l2 > 0.1, "{k:?}");
    }
}

#[test]
fn knockout_table_and_determinism() {
    let f = fixture("preact_nonorm.onnx");
    let args = ["audit", f.to_str().unwrap(), "--knockout", "-q"];
    let a = shunt(&args);
    assert_eq!(a.code, 0, "{}", a.stderr);
    assert!(a.stdout.contains("knockout"), "{}", a.stdout);
    assert!(a.stdout.contains("effective depth"), "{}", a.stdout);
    let b = shunt(&args);
    assert_eq!(a.stdout, b.stdout);
}

/// The knockout of every block of the trained digits model on its held-out
/// images (fixtures/torch/train_digits.py), as JSON.
fn digits_knockout() -> Report {
    let model = fixture("torch/digits_resnet.onnx");
    let feed = fixture("torch/digits_holdout.npy");
    let run = shunt(&[
        "audit",
        model.to_str().unwrap(),
        "--knockout",
        "--feed",
        feed.to_str().unwrap(),
        "--batch",
        "64",
        "-q",
        "--format",
        "json",
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    serde_json::from_str(&run.stdout).unwrap()
}

// Reference: onnxruntime (pinned in tests/reference/requirements.txt) runs
// the same model with each merge replaced by an Identity of its shortcut
// (tests/reference/knockout.py: an independent surgery, no gates), on the
// same inputs, and computes the relative change in float64. The two engines
// agree on float32 outputs to ~1e-7 relative here; we allow 1e-5.
#[test]
fn knockout_of_a_trained_model_matches_onnxruntime() {
    let r = digits_knockout();
    let dir = crate::util::tempdir();
    let merges: Vec<(String, String)> =
        r.blocks.iter().map(|b| (b.output.clone(), b.shortcut.input.clone())).collect();
    let list = dir.path().join("merges.json");
    std::fs::write(&list, serde_json::to_string(&merges).unwrap()).unwrap();
    let script = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join("knockout.py");
    let out = crate::util::python(
        &std::fs::read_to_string(&script).unwrap(),
        &[
            fixture("torch/digits_resnet.onnx").to_str().unwrap(),
            fixture("torch/digits_holdout.npy").to_str().unwrap(),
            list.to_str().unwrap(),
        ],
    );
    let want: Vec<f64> = serde_json::from_str(out.trim()).unwrap();
    let got: Vec<f64> = influence(&r).blocks.iter().map(|b| b.knockout.unwrap().rel_l2).collect();
    assert_eq!(got.len(), 9);
    for (g, w) in got.iter().zip(&want) {
        assert!((g - w).abs() <= 1e-5 * w, "{got:?} vs onnxruntime {want:?}");
    }
}

// [S3] Residual Networks Behave Like Ensembles of Relatively Shallow
// Networks, arXiv:1605.06431: knocking out a single block of a trained
// residual network usually changes the output little, except the blocks that
// change resolution (qualitative). On the trained 9-block digits model
// (3 stages of 3, blocks 4 and 7 downsample, [R4]), fed 64 held-out images:
// the two downsampling blocks rank among the three largest changes, and
// removing any other block but the first keeps the predicted class of at
// least 90% of the images, more on average than removing a downsampling
// block. (The first block, right after the stem, is the other exception in
// this shallow net; the README discusses it.)
#[test]
fn knockout_ranking_of_a_trained_model_follows_the_ensemble_view() {
    let r = digits_knockout();
    let inf = influence(&r);
    let resizing: Vec<usize> =
        inf.blocks.iter().filter(|b| b.changes_resolution).map(|b| b.block).collect();
    assert_eq!(resizing, vec![4, 7]);
    // fixtures/torch/MANIFEST.txt: digits_resnet.onnx additive=9.
    assert_eq!(inf.blocks.len(), 9);
    for b in &inf.blocks {
        if b.changes_resolution {
            assert!(b.rank.unwrap() <= 3, "block {} ranks {:?}", b.block, b.rank);
        }
    }
    let top1 = |b: &shunt::report::InfluenceRow| b.knockout.unwrap().top1.unwrap();
    let others: Vec<f64> =
        inf.blocks.iter().filter(|b| !b.changes_resolution && b.block > 1).map(top1).collect();
    let resizing: Vec<f64> = inf.blocks.iter().filter(|b| b.changes_resolution).map(top1).collect();
    assert!(others.iter().all(|&t| t >= 0.9), "{others:?}");
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    assert!(mean(&resizing) < mean(&others), "{resizing:?} vs {others:?}");
}

#[test]
fn vanishing_gain_and_low_impact_through_the_binary() {
    // x + W x with W = -0.9 I: every block passes on a tenth of a change, so
    // the gain is 1e-1, 1e-2, 1e-3 after blocks 1, 2, 3: block 2 sits at the
    // limit 1/100 (not below it), block 3 is the first below.
    let width = 8usize;
    let mut b = ModelBuilder::new("shrinking", 17).seed(1);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(width as i64)]);
    for i in 0..3 {
        let w: Vec<f32> =
            (0..width * width).map(|k| if k / width == k % width { -0.9 } else { 0.0 }).collect();
        let h = b.gemm(&format!("b{i}.fc"), &x, width as i64, &Init::Values(w));
        x = b.add(&format!("b{i}.add"), &x, &h);
    }
    b.output(&x);
    let dir = crate::util::tempdir();
    let path = dir.path().join("shrinking.onnx");
    std::fs::write(&path, prost::Message::encode_to_vec(&b.finish())).unwrap();
    let p = path.to_str().unwrap();
    let run =
        shunt(&["audit", p, "--gain", "-q", "--format", "json", "--fail-on", "vanishing-gain"]);
    assert_eq!(run.code, 1, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    let f: Vec<(&str, Option<usize>)> =
        r.findings.iter().map(|f| (f.code.as_str(), f.block)).collect();
    assert_eq!(f, vec![("vanishing-gain", Some(3))]);
    let g = influence(&r).blocks[2].gain_to_here.unwrap();
    assert!((g - 1e-3).abs() < 1e-5, "{g}");

    // Knockout: each branch is -0.9 of its shortcut, so removing one scales
    // the outputs by 10: far from low impact; the zero-branch fixture is.
    let run = shunt(&["audit", p, "--knockout", "-q", "--fail-on", "low-impact"]);
    assert_eq!(run.code, 0, "{}{}", run.stdout, run.stderr);
    let f = fixture("rezero.onnx");
    let run = shunt(&["audit", f.to_str().unwrap(), "--knockout", "-q", "--fail-on", "low-impact"]);
    assert_eq!(run.code, 1, "{}{}", run.stdout, run.stderr);
    assert!(run.stdout.contains("low-impact"));
}

#[test]
fn no_float_input_means_no_gain_but_knockout_still_runs() {
    let f = fixture("torch/encoder_prenorm_decomposed.onnx");
    let run = shunt(&["audit", f.to_str().unwrap(), "--knockout", "-q", "--format", "json"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    let inf = influence(&r);
    assert!(inf.effective_depth.is_none());
    assert!(inf.blocks.iter().all(|b| b.gain.is_none() && b.knockout.is_some()));
}

/// The gate surgery itself (`shunt::gate`), on a model small enough to read.
mod gate_surgery {
    use shunt::gate::{Site, insert};
    use shunt::proto::ModelProto;
    use shunt_testkit::builder::{Dim, Init, ModelBuilder};

    fn tiny() -> ModelProto {
        let mut b = ModelBuilder::new("tiny", 17).seed(3);
        let x = b.input("x", &[Dim::batch(), Dim::Fixed(4)]);
        let h = b.gemm("fc", &x, 4, &Init::HeNormal);
        let y = b.add("add", &x, &h);
        b.output(&y);
        b.finish()
    }

    #[test]
    fn gates_multiply_the_merge_inputs_and_keep_order() {
        let mut m = tiny();
        let before = m.graph.as_ref().unwrap().node.len();
        // The testkit names a node's output after the node.
        let g = m.graph.as_ref().unwrap();
        let add = g.node.iter().find(|n| n.op_type == "Add").unwrap();
        let site = Site {
            output: add.output[0].clone(),
            shortcut: add.input[0].clone(),
            branch: vec![add.input[1].clone()],
        };
        let gates = insert(&mut m, &[site], true).unwrap();
        let g = m.graph.as_ref().unwrap();
        assert_eq!(g.node.len(), before + 2);
        assert_eq!(gates.branch, vec!["shunt.gate.1.branch"]);
        assert_eq!(gates.shortcut, vec!["shunt.gate.1.shortcut"]);
        assert!(g.input.iter().any(|i| i.name == "shunt.gate.1.branch"));
        let add = g.node.iter().position(|n| n.op_type == "Add").unwrap();
        // Both Muls come before the merge, and the merge reads only gated tensors.
        for i in &g.node[add].input {
            let p = g.node.iter().position(|n| n.output.contains(i)).unwrap();
            assert!(p < add);
            assert_eq!(g.node[p].op_type, "Mul");
        }
    }

    #[test]
    fn a_missing_merge_is_an_error() {
        let mut m = tiny();
        let site = Site { output: "nope".into(), shortcut: "x".into(), branch: vec![] };
        assert!(insert(&mut m, &[site], false).is_err());
    }
}
