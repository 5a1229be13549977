//! The words of shunt's documents: every closed set of names a report, a
//! pin, an expectation file, a comparison or a batch writes or reads
//! (placement, shortcut kind, finding code, severity, pair status, difference
//! code, …), each an enum with exactly one spelling per variant.
//!
//! One macro, [`words!`], gives every enum the same mapping: `as_str` (the
//! word written), `parse` (the word read back; `None` for any other),
//! `ALL` (declaration order), `Display` (padding honoured, so `{:<18}`
//! aligns), and serde as the plain word. Reading a word not in the set is an
//! error naming the known words, so a pin or expectation file with a typo is
//! refused instead of silently never matching. The derived order is the
//! declaration order, which some stages rely on (a simpler shortcut kind
//! first); maps keyed by words in the documents keep the words as keys.
//!
//! **Invariant:** no crate-internal imports; the words are the wire format
//! (changing one is a schema change).

use std::fmt;

use serde::de::{self, Deserializer};
use serde::{Deserialize, Serialize, Serializer};

/// Defines a closed set of words as an enum with one spelling per variant.
macro_rules! words {
    (
        $(#[$meta:meta])*
        pub enum $name:ident ($what:literal) {
            $( $(#[$vmeta:meta])* $variant:ident = $word:literal, )+
        }
    ) => {
        $(#[$meta])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
        pub enum $name {
            $( $(#[$vmeta])* $variant, )+
        }

        impl $name {
            /// Every word, in declaration order.
            pub const ALL: &'static [$name] = &[$($name::$variant),+];

            /// The word as written in documents and on the command line.
            pub const fn as_str(self) -> &'static str {
                match self {
                    $( $name::$variant => $word, )+
                }
            }

            /// The variant spelled `word`, if any.
            pub fn parse(word: &str) -> Option<$name> {
                match word {
                    $( $word => Some($name::$variant), )+
                    _ => None,
                }
            }

            /// Every word, comma-separated (for messages).
            pub fn known() -> String {
                $name::ALL.iter().map(|w| w.as_str()).collect::<Vec<_>>().join(", ")
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.pad(self.as_str())
            }
        }

        impl Serialize for $name {
            fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                s.serialize_str(self.as_str())
            }
        }

        impl<'de> Deserialize<'de> for $name {
            fn deserialize<D: Deserializer<'de>>(d: D) -> Result<$name, D::Error> {
                let word = <std::borrow::Cow<'de, str>>::deserialize(d)?;
                $name::parse(&word).ok_or_else(|| {
                    de::Error::custom(format!(
                        "unknown {} '{}' (known: {})",
                        $what,
                        word,
                        $name::known()
                    ))
                })
            }
        }
    };
}

words! {
    /// Where normalisation and activation sit relative to the merge.
    pub enum Placement ("placement") {
        /// An activation consumes the merge output: `relu(F(x) + x)` ([R3]).
        PostActivation = "post-activation",
        /// The branch opens with a normalisation or activation (or both branch
        /// and shortcut start after one) and the merge output is not activated ([P1]).
        PreActivation = "pre-activation",
        /// The branch opens with a layer normalisation: `x + F(LN(x))` ([T2]).
        PreNorm = "pre-norm",
        /// A normalisation consumes the merge output: `LN(x + F(x))` ([T1]).
        PostNorm = "post-norm",
        /// Neither: `x + F(x)` with a linear end and nothing after ([M1]).
        Unactivated = "unactivated",
    }
}

words! {
    /// What kind of path a shortcut is, simplest first.
    pub enum ShortcutKind ("shortcut kind") {
        /// The fork tensor itself, through at most reshapes, casts,
        /// quantize/dequantize pairs or a normalisation.
        Identity = "identity",
        /// One learned linear layer (1x1 convolution, fully connected),
        /// optionally with a normalisation or a folded scale and shift.
        Projection = "projection",
        /// Pooling, strided slicing, padding or resizing, with or without one
        /// projection.
        Resampled = "resampled",
        /// A learned constant (an initializer or Constant node, possibly
        /// reshaped or expanded to the batch) that the branch reads too: the
        /// class token of a class-attention layer ([K1]).
        Parameter = "parameter",
    }
}

words! {
    /// Why a branch is dead by construction.
    pub enum DeadReason ("dead reason") {
        /// A constant scale at the end of the branch is all zeros.
        ZeroScale = "zero-scale",
        /// A normalisation's scale is all zeros.
        ZeroNormScale = "zero-norm-scale",
        /// Every weight of a layer on every path is zero.
        ZeroWeights = "zero-weights",
    }
}

words! {
    /// Why a merge of several signals is not a residual block.
    pub enum NotBlockReason ("reason") {
        /// Its inputs come from independent signals (separate graph inputs).
        Independent = "independent-inputs",
        /// No input reaches it from the fork as a shortcut.
        NoShortcut = "no-shortcut",
        /// No path from the fork holds a layer with weights: elementwise arithmetic.
        NoLearnedLayer = "no-learned-layer",
        /// The sum of two heads on a common map: the would-be shortcut ends in
        /// a learned layer of the fork, and no learned layer follows the sum
        /// (a prediction, not a residual stream that later layers read).
        HeadSum = "sum-of-heads",
    }
}

impl NotBlockReason {
    /// A short explanation.
    pub fn describe(self) -> &'static str {
        match self {
            NotBlockReason::Independent => "its inputs come from independent signals",
            NotBlockReason::NoShortcut => "no input reaches it from the fork as a shortcut",
            NotBlockReason::NoLearnedLayer => "no path from the fork holds a layer with weights",
            NotBlockReason::HeadSum => {
                "it adds two heads computed from one map: one input is a learned layer of the \
                 fork, not its identity, and no learned layer reads the sum"
            }
        }
    }
}

words! {
    /// What kind of finding, in report order.
    pub enum FindingCode ("finding") {
        /// The branch cannot depend on its input (all-zero constants).
        StaticDead = "static-dead",
        /// Learned layers inside a stage that no shortcut spans.
        LostShortcut = "lost-shortcut",
        /// The branch is negligible next to its shortcut.
        Dead = "dead",
        /// The branch dominates its shortcut.
        Dominant = "dominant",
        /// Many channels of the branch are negligible next to the shortcut's.
        DeadChannels = "dead-channels",
        /// NaN or infinite values in a block.
        NonFinite = "non-finite",
        /// The signal grows by more than the depth factor across the blocks.
        ExplodingSignal = "exploding-signal",
        /// The signal shrinks by more than the depth factor across the blocks.
        VanishingSignal = "vanishing-signal",
        /// Knocking out the branch changes the outputs by almost nothing.
        LowImpact = "low-impact",
        /// A small input change grows by more than the gain factor along the blocks.
        ExplodingGain = "exploding-gain",
        /// A small input change shrinks by more than the gain factor along the blocks.
        VanishingGain = "vanishing-gain",
        /// A block's largest |x| exceeds the target format's largest finite value.
        Overflow = "overflow",
        /// A block's headroom in the target format is below the margin.
        OverflowRisk = "overflow-risk",
        /// Many of a block's values would be zero or subnormal in the target format.
        UnderflowRisk = "underflow-risk",
        /// Outlier channels leave the median channel few levels of an int8 per-tensor scale.
        Int8OutlierChannels = "int8-outlier-channels",
    }
}

impl FindingCode {
    /// Whether the structure alone can raise it (no run needed).
    pub fn is_structural(self) -> bool {
        matches!(self, FindingCode::StaticDead | FindingCode::LostShortcut)
    }
}

words! {
    /// A number format a model may be converted to (`--precision`).
    pub enum Precision ("precision") {
        /// IEEE 754-2008 binary16: largest finite 65504, smallest normal 2^-14.
        Fp16 = "fp16",
        /// bfloat16: float32's 8 exponent bits, 8 significand bits.
        Bf16 = "bf16",
        /// 8-bit integers with a symmetric per-tensor scale (127 levels each side).
        Int8 = "int8",
    }
}

words! {
    /// How serious a diagnostic is.
    pub enum Severity ("severity") {
        /// Worth knowing; the analysis is complete.
        Note = "note",
        /// Part of the analysis may be incomplete or less precise.
        Warning = "warning",
    }
}

words! {
    /// The command a report or a batch comes from.
    pub enum Command ("command") {
        /// Structure only.
        Scan = "scan",
        /// Structure, and measurements when the model ran.
        Audit = "audit",
    }
}

words! {
    /// What `shunt verify` checked a model against.
    pub enum Against ("file kind") {
        /// A pin file written by `shunt pin`.
        Pin = "pin",
        /// A hand-written expectation file.
        Expect = "expect",
    }
}

words! {
    /// What differs between a model and a pin or an expectation
    /// (docs/checking.md).
    pub enum DifferenceCode ("difference") {
        /// Pin: two pinned blocks appear in swapped order.
        SwappedBlocks = "swapped-blocks",
        /// Pin: a paired block's shortcut kind differs.
        ShortcutChanged = "shortcut-changed",
        /// Pin: a paired block's placement differs.
        PlacementChanged = "placement-changed",
        /// Pin: a paired block's learned layers differ.
        BranchChanged = "branch-changed",
        /// Pin: a paired block's depth or parent differs.
        NestingChanged = "nesting-changed",
        /// Pin: a pinned block has no counterpart.
        MissingBlock = "missing-block",
        /// Pin: a model block has no counterpart.
        ExtraBlock = "extra-block",
        /// Pin or expectation: a stage holds another number of blocks.
        StageBlocks = "stage-blocks",
        /// Pin: a pinned stage is not in the model.
        MissingStage = "missing-stage",
        /// Pin: a model stage is not in the pin.
        ExtraStage = "extra-stage",
        /// Expectation: the number of blocks.
        BlockCount = "block-count",
        /// Expectation: a block's placement.
        Placement = "placement",
        /// Expectation: which blocks have a projection shortcut.
        Projection = "projection",
        /// Expectation: the deepest nesting.
        Nesting = "nesting",
        /// Expectation: the number of stages.
        StageCount = "stage-count",
        /// Expectation: a stage's shape.
        StageShape = "stage-shape",
        /// Expectation: a forbidden finding occurred.
        Finding = "finding",
        /// Expectation: a block's ratio is outside the limits or unmeasured.
        Ratio = "ratio",
    }
}

words! {
    /// How a block of model A pairs with model B in a comparison.
    pub enum PairStatus ("pair status") {
        /// Paired, with the same structure.
        Same = "same",
        /// Paired, with structural differences.
        Changed = "changed",
        /// Only in A.
        OnlyA = "only-a",
        /// Only in B.
        OnlyB = "only-b",
    }
}

words! {
    /// The outcome of one model of a batch.
    pub enum EntryStatus ("status") {
        /// Analysed without findings.
        Ok = "ok",
        /// Analysed, with at least one finding.
        Findings = "findings",
        /// Could not be analysed or run.
        Error = "error",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_word_reads_back_and_others_are_refused() {
        for &p in Placement::ALL {
            assert_eq!(Placement::parse(p.as_str()), Some(p));
            assert_eq!(serde_json::to_string(&p).unwrap(), format!("\"{p}\""));
        }
        assert_eq!(FindingCode::ALL.len(), 15);
        assert_eq!(FindingCode::parse("deadish"), None);
        let e = serde_json::from_str::<Placement>("\"sideways\"").unwrap_err().to_string();
        assert!(e.contains("unknown placement 'sideways' (known: post-activation, "), "{e}");
        assert_eq!(format!("[{:<8}]", Severity::Note), "[note    ]");
    }

    #[test]
    fn the_simpler_shortcut_orders_first() {
        assert!(ShortcutKind::Identity < ShortcutKind::Projection);
        assert!(ShortcutKind::Projection < ShortcutKind::Resampled);
    }
}
