//! Text helpers shared by every renderer: names from a model made safe for
//! a terminal, counts in words, numbers for people.

/// Makes a name from a model safe for a terminal: control characters,
/// escape sequences and bidirectional overrides become visible `\u{..}` escapes.
pub fn terminal_safe(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        let bidi = matches!(c, '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}' | '\u{200e}' | '\u{200f}');
        if c.is_control() || bidi {
            out.push_str(&format!("\\u{{{:x}}}", c as u32));
        } else {
            out.push(c);
        }
    }
    out
}

/// `1 block`, `3 blocks`.
pub fn plural(n: usize, word: &str) -> String {
    if n == 1 { format!("1 {word}") } else { format!("{n} {word}s") }
}

/// Three significant digits near 1, scientific notation far from it.
pub fn num(v: f64) -> String {
    if v == 0.0 {
        return "0".to_owned();
    }
    if !v.is_finite() {
        return format!("{v}");
    }
    let a = v.abs();
    if (1e-3..1e4).contains(&a) {
        let decimals = (2 - a.log10().floor() as i32).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.2e}")
    }
}
