//! How findings look in the visual reports: one colour, one shape and one
//! short label per finding code, so a block's mark can be read without colour.
//!
//! Colours are from the Okabe–Ito palette (Okabe and Ito, "Color Universal
//! Design", 2008), chosen to stay distinct for the common forms of colour
//! blindness; every shape is also different, and flagged marks carry a text
//! label, so colour is never the only cue.

use crate::vocab::FindingCode;

/// The look of one kind of mark.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Mark {
    /// CSS class and `data-kind` value: `ok`, `dead`, `dominant`, …
    pub(crate) kind: &'static str,
    /// Fill colour (Okabe–Ito).
    pub(crate) fill: &'static str,
    /// SVG path of the shape, centred on (0, 0), about 14 px across.
    pub(crate) path: &'static str,
    /// Words for the legend.
    pub(crate) legend: &'static str,
}

/// Okabe–Ito blue: blocks without findings.
pub(crate) const OK: Mark = Mark {
    kind: "ok",
    fill: "#0072B2",
    path: "M-4.5,0a4.5,4.5 0 1,0 9,0a4.5,4.5 0 1,0 -9,0Z",
    legend: "no finding (circle)",
};
/// Okabe–Ito vermillion, a downward triangle: the branch contributes nothing.
pub(crate) const DEAD: Mark = Mark {
    kind: "dead",
    fill: "#D55E00",
    path: "M-7,-5L7,-5L0,7Z",
    legend: "dead branch: dead or static-dead (downward triangle)",
};
/// Okabe–Ito orange, an upward triangle: the branch drowns the shortcut.
pub(crate) const DOMINANT: Mark = Mark {
    kind: "dominant",
    fill: "#E69F00",
    path: "M-7,5L7,5L0,-7Z",
    legend: "dominant branch (upward triangle)",
};
/// Okabe–Ito bluish green, a diamond: many dead channels.
pub(crate) const DEAD_CHANNELS: Mark = Mark {
    kind: "dead-channels",
    fill: "#009E73",
    path: "M0,-7L7,0L0,7L-7,0Z",
    legend: "dead channels (diamond)",
};
/// Okabe–Ito sky blue, a square: learned layers before the block that no
/// shortcut spans.
pub(crate) const LOST_SHORTCUT: Mark = Mark {
    kind: "lost-shortcut",
    fill: "#56B4E9",
    path: "M-6,-6L6,-6L6,6L-6,6Z",
    legend: "lost shortcut before the block (square)",
};
/// Black, a cross: NaN or infinite values.
pub(crate) const NON_FINITE: Mark = Mark {
    kind: "non-finite",
    fill: "#000000",
    path: "M-7,-4L-4,-7L0,-3L4,-7L7,-4L3,0L7,4L4,7L0,3L-4,7L-7,4L-3,0Z",
    legend: "NaN or infinite values (cross)",
};
/// Okabe–Ito yellow, a hexagon: knocking the branch out barely changes the
/// outputs.
pub(crate) const LOW_IMPACT: Mark = Mark {
    kind: "low-impact",
    fill: "#F0E442",
    path: "M-7,0L-3.5,-6L3.5,-6L7,0L3.5,6L-3.5,6Z",
    legend: "low impact when knocked out (hexagon)",
};
/// Dark grey, a bar with end caps: the block's range does not fit the
/// target format (overflow or its risk, underflow, int8 outlier channels).
pub(crate) const RANGE: Mark = Mark {
    kind: "range",
    fill: "#5A5A5A",
    path: "M-7,-7L7,-7L7,-4L2,-4L2,4L7,4L7,7L-7,7L-7,4L-2,4L-2,-4L-7,-4Z",
    legend: "range does not fit the target format (I-beam)",
};
/// Hollow grey: a block that was not measured.
pub(crate) const UNMEASURED: Mark = Mark {
    kind: "unmeasured",
    fill: "none",
    path: "M-4,0a4,4 0 1,0 8,0a4,4 0 1,0 -8,0Z",
    legend: "not measured (hollow circle, drawn on the axis)",
};

/// Okabe–Ito reddish purple, a chevron up: the signal (or a small input
/// change) grows too much across depth.
pub(crate) const EXPLODING: Mark = Mark {
    kind: "exploding-signal",
    fill: "#CC79A7",
    path: "M-7,1L0,-7L7,1L7,6L0,-2L-7,6Z",
    legend: "signal or input change grows across depth (chevron up)",
};
/// Okabe–Ito reddish purple, a chevron down: the signal shrinks too much.
pub(crate) const VANISHING: Mark = Mark {
    kind: "vanishing-signal",
    fill: "#CC79A7",
    path: "M-7,-1L0,7L7,-1L7,-6L0,2L-7,-6Z",
    legend: "signal or input change shrinks across depth (chevron down)",
};

/// Every mark of a block, in the order of the legend.
pub(crate) const ALL: [Mark; 11] = [
    OK,
    DEAD,
    DOMINANT,
    RANGE,
    EXPLODING,
    VANISHING,
    DEAD_CHANNELS,
    LOST_SHORTCUT,
    LOW_IMPACT,
    NON_FINITE,
    UNMEASURED,
];

/// The mark of a block from its finding codes: the most severe one decides
/// (non-finite, then a dead branch, dominant, a range that does not fit the
/// target format, a growing or shrinking input change, dead channels, lost
/// shortcut, low impact). The signal's growth
/// across depth is a finding of the whole model and marks no block.
pub(crate) fn for_codes(codes: impl IntoIterator<Item = FindingCode>) -> Mark {
    let mut best: Option<(u8, Mark)> = None;
    for code in codes {
        let candidate = match code {
            FindingCode::NonFinite => (0, NON_FINITE),
            FindingCode::Dead | FindingCode::StaticDead => (1, DEAD),
            FindingCode::Dominant => (2, DOMINANT),
            FindingCode::Overflow
            | FindingCode::OverflowRisk
            | FindingCode::UnderflowRisk
            | FindingCode::Int8OutlierChannels => (3, RANGE),
            FindingCode::ExplodingGain => (4, EXPLODING),
            FindingCode::VanishingGain => (4, VANISHING),
            FindingCode::DeadChannels => (5, DEAD_CHANNELS),
            FindingCode::LostShortcut => (6, LOST_SHORTCUT),
            FindingCode::LowImpact => (7, LOW_IMPACT),
            FindingCode::ExplodingSignal | FindingCode::VanishingSignal => continue,
        };
        if best.is_none_or(|(rank, _)| candidate.0 < rank) {
            best = Some(candidate);
        }
    }
    best.map_or(OK, |(_, m)| m)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_most_severe_finding_decides() {
        use FindingCode as C;
        assert_eq!(for_codes([]), OK);
        assert_eq!(for_codes([C::StaticDead, C::Dead]), DEAD);
        assert_eq!(for_codes([C::LostShortcut, C::Dominant]), DOMINANT);
        assert_eq!(for_codes([C::DeadChannels, C::NonFinite]), NON_FINITE);
        assert_eq!(for_codes([C::ExplodingSignal]), OK);
        assert_eq!(for_codes([C::LowImpact, C::ExplodingGain]), EXPLODING);
        assert_eq!(for_codes([C::OverflowRisk, C::ExplodingGain]), RANGE);
        assert_eq!(for_codes([C::Overflow, C::NonFinite]), NON_FINITE);
    }

    #[test]
    fn every_mark_differs_in_shape_and_colour() {
        for (i, a) in ALL.iter().enumerate() {
            for b in &ALL[i + 1..] {
                assert_ne!(a.kind, b.kind);
                assert_ne!(a.path, b.path, "{} and {}", a.kind, b.kind);
                // Growing and shrinking share a colour and differ in direction.
                if a.kind != "exploding-signal" || b.kind != "vanishing-signal" {
                    assert_ne!(a.fill, b.fill, "{} and {}", a.kind, b.kind);
                }
            }
        }
    }
}
