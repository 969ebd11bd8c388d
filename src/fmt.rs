//! Number formatting shared by every rendering (knob values, estimates with four significant
//! digits, standard errors with two), and the text marks every rendering keeps out ([`reorders`]).

/// Formats a knob value compactly (`3`, `0.01`, `1e-4`).
pub fn fmt_value(v: f64) -> String {
    if v.fract() == 0.0 && v.abs() < 1e9 {
        format!("{}", v as i64)
    } else if v != 0.0 && (v.abs() < 1e-3 || v.abs() >= 1e6) {
        format!("{v:.3e}")
    } else {
        // Four significant digits, trailing zeros dropped (3.162, 31.62, 0.01).
        let digits = (3 - v.abs().log10().floor() as i32).clamp(0, 6) as usize;
        let s = format!("{v:.digits$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    }
}

/// Formats a standard error with two significant digits.
pub fn fmt_se(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let a = v.abs();
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
        format!("{v:.1e}")
    } else {
        let digits = if a == 0.0 {
            2
        } else {
            (1 - a.log10().floor() as i32).clamp(0, 6) as usize
        };
        format!("{v:.digits$}")
    }
}

/// Formats a number with 4 significant digits.
pub fn fmt_num(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let a = v.abs();
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
        format!("{v:.3e}")
    } else {
        let digits = if a == 0.0 {
            3
        } else {
            (3 - a.log10().floor() as i32).clamp(0, 6) as usize
        };
        format!("{v:.digits$}")
    }
}

/// A number quoted in a message, exactly (shortest round-trip digits) but compact: `{}` prints
/// `1e308` as 309 digits and `f64::MIN_POSITIVE` as 300, so magnitudes outside
/// `[1e-6, 1e15)` use the exponent form (`1e308`, `2.2250738585072014e-308`).
pub fn fmt_exact(v: f64) -> String {
    let a = v.abs();
    if v == 0.0 || !v.is_finite() || (1e-6..1e15).contains(&a) {
        format!("{v}")
    } else {
        format!("{v:e}")
    }
}

/// A message with every number quoted in backticks that is longer than 24 characters written
/// as [`fmt_exact`] writes it (a parser printed `replicates = 1e308` as 309 digits).
pub fn shorten_quoted_numbers(message: &str) -> String {
    message
        .split('`')
        .enumerate()
        .map(|(i, part)| match part.parse::<f64>() {
            Ok(v) if i % 2 == 1 && part.len() > 24 => fmt_exact(v),
            _ => part.to_string(),
        })
        .collect::<Vec<_>>()
        .join("`")
}

/// Shortens text quoted in a one-line message: at most `max` characters, then `…` and the full
/// length (a 200 KB formula is never echoed whole). Line breaks become spaces.
pub fn clip(s: &str, max: usize) -> String {
    let n = s.chars().count();
    let one_line = |t: &str| t.replace(['\n', '\r'], " ");
    if n <= max {
        return one_line(s);
    }
    let head: String = s.chars().take(max).collect();
    format!("{}… ({n} characters)", one_line(&head))
}

/// A share as a whole percentage, halves rounded up (`0.125` → `13%`; formatting `12.5` with
/// `{:.0}` rounds half to even and printed 12% beside 28% for 0.275).
pub fn fmt_percent(share: f64) -> String {
    format!("{:.0}%", (100.0 * share).round())
}

/// Bytes as `12.3 MiB`.
pub fn fmt_bytes(b: f64) -> String {
    const UNITS: [&str; 6] = ["bytes", "KiB", "MiB", "GiB", "TiB", "PiB"];
    let mut v = b.max(0.0);
    let mut u = 0;
    while v >= 1024.0 && u + 1 < UNITS.len() {
        v /= 1024.0;
        u += 1;
    }
    if u == 0 && format!("{v:.0}") == "1" {
        "1 byte".to_string()
    } else if u == 0 {
        format!("{v:.0} bytes")
    } else {
        format!("{v:.1} {}", UNITS[u])
    }
}

/// A mark that reorders text when it is shown (the bidirectional marks, embeddings,
/// overrides and isolates of Unicode's bidirectional algorithm, the Arabic letter mark
/// among them): a name holding U+202E printed the rest of its line backwards. Printed words
/// escape them, scenario names refuse them and pictures replace them.
pub fn reorders(c: char) -> bool {
    matches!(
        c,
        '\u{061c}' | '\u{200e}' | '\u{200f}' | '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}'
    )
}
