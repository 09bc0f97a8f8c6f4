//! The one float formatter: doubles as the shortest decimal text that reads
//! back to the same bits, for run.json, scores.csv, the card and the
//! exchange files of external commands. Depends on nothing else here.

/// A double as the shortest decimal that reads back to the same bits.
pub fn fmt_f64(v: f64) -> String {
    if v.is_finite() {
        // Rust's `Display` for f64 is the shortest round-trip form (no exponent).
        format!("{v}")
    } else if v.is_nan() {
        "NaN".into()
    } else if v > 0.0 {
        "inf".into()
    } else {
        "-inf".into()
    }
}

/// Appends `v` to `out` as the shortest decimal that reads back to the same
/// bits, in plain notation like [`fmt_f64`], several times faster: ryu's
/// digits for 1e-5 ≤ |v| < 1e16 (a trailing `.0` dropped), `Display` for the
/// rest. ryu and `Display` find the same shortest digits except where two
/// candidates are equally near the double (ryu then takes the even last
/// digit), so the text can differ from [`fmt_f64`]'s in that last digit,
/// never in the value (tested).
pub fn push_f64(out: &mut String, v: f64) {
    if !v.is_finite() {
        out.push_str(&fmt_f64(v));
        return;
    }
    let mut buf = ryu::Buffer::new();
    let s = buf.format_finite(v);
    if s.as_bytes().contains(&b'e') {
        use std::fmt::Write;
        let _ = write!(out, "{v}");
    } else {
        out.push_str(s.strip_suffix(".0").unwrap_or(s));
    }
}
