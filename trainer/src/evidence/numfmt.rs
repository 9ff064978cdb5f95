//! The report's number formats. A table column (or a row that is one
//! quantity) gets one format, chosen from all of its values: whole counts
//! with thousands separators, fractions as percent, SI prefixes for units
//! that take them (s, Hz, B), fixed decimals while the values lie within
//! three decades, else scientific notation for the whole column. The page
//! tags each number with the factor it applied (`data-x`), so a reader of
//! the page can divide it out and compare with `report.json`.

/// What a number is, which decides its unit and scaling.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Quantity<'a> {
    /// A whole count (samples, parameters, steps): no unit.
    Count,
    /// A ratio shown as percent (relative errors, drifts, margins).
    Fraction,
    /// A unit that takes SI prefixes (s, Hz, B).
    Si(&'a str),
    /// A unit shown as it is (rad, kg m^2/s, J, "-" for unitless).
    Plain(&'a str),
}

/// How the digits are written.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Style {
    /// Whole numbers with thousands separators.
    Whole,
    /// Fixed decimals.
    Fixed(usize),
    /// Scientific notation with this many decimals in the mantissa.
    Sci(usize),
}

/// One column's format: a factor applied to the value, the unit shown, and
/// the digits.
#[derive(Debug, Clone, PartialEq)]
pub struct ColFmt {
    /// Power of ten the value is multiplied by (2 for percent, -6 for M).
    exp10: i32,
    unit: String,
    style: Style,
}

/// SI prefixes from pico to tera (SI Brochure, 9th edition, table 7).
const PREFIXES: [(i32, &str); 9] = [
    (-12, "p"),
    (-9, "n"),
    (-6, "µ"),
    (-3, "m"),
    (0, ""),
    (3, "k"),
    (6, "M"),
    (9, "G"),
    (12, "T"),
];

impl ColFmt {
    /// The format for a column of `values` of quantity `q` (non-finite
    /// values are ignored; they print as "-").
    pub fn choose(values: &[f64], q: Quantity<'_>) -> Self {
        let finite: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
        let hi = finite.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let (exp10, unit) = match q {
            Quantity::Count => (0, String::new()),
            Quantity::Fraction => (2, "%".to_string()),
            Quantity::Plain(u) => (0, u.to_string()),
            Quantity::Si(u) => {
                let e = if hi > 0.0 {
                    ((hi.log10() / 3.0).floor() as i32 * 3).clamp(-12, 12)
                } else {
                    0
                };
                let p = PREFIXES.iter().find(|(x, _)| *x == e).map_or("", |p| p.1);
                // Bytes stay whole: kB of a blob would hide the count.
                if u == "B" {
                    (0, u.to_string())
                } else {
                    (-e, format!("{p}{u}"))
                }
            }
        };
        let scaled: Vec<f64> = finite.iter().map(|v| scale(*v, exp10)).collect();
        let whole = scaled.iter().all(|v| v.fract() == 0.0);
        let big = scaled.iter().any(|v| v.abs() >= 1e9);
        let style = if whole && (q == Quantity::Count || !big) {
            Style::Whole
        } else {
            digits(&scaled)
        };
        Self { exp10, unit, style }
    }

    /// The unit to show (empty for counts).
    pub fn unit(&self) -> &str {
        &self.unit
    }

    /// The factor the shown number carries relative to the stored value.
    pub fn factor(&self) -> f64 {
        10f64.powi(self.exp10)
    }

    /// The factor as the page writes it (`data-x`): "1e2", "1e-6".
    pub fn factor_text(&self) -> String {
        format!("1e{}", self.exp10)
    }

    /// The digits of `v` (no unit); "-" when not finite.
    pub fn text(&self, v: f64) -> String {
        if !v.is_finite() {
            return "-".into();
        }
        let s = scale(v, self.exp10);
        match self.style {
            Style::Whole => thousands(s),
            Style::Fixed(d) => format!("{s:.d$}"),
            Style::Sci(d) => format!("{s:.d$e}"),
        }
    }

    /// The digits followed by the unit ("4,691 B", "0.10 ms", "22.6 %").
    pub fn with_unit(&self, v: f64) -> String {
        if self.unit.is_empty() || self.unit == "-" {
            self.text(v)
        } else {
            format!("{} {}", self.text(v), self.unit)
        }
    }
}

/// `v` times 10^e in one correctly rounded operation (10^|e| is exact).
fn scale(v: f64, e: i32) -> f64 {
    if e >= 0 {
        v * 10f64.powi(e)
    } else {
        v / 10f64.powi(-e)
    }
}

/// Fixed decimals giving the smallest nonzero magnitude three significant
/// digits when the column spans at most three decades and stays within
/// [1e-4, 1e6); scientific notation with three significant digits otherwise.
fn digits(scaled: &[f64]) -> Style {
    let hi = scaled.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let lo = scaled
        .iter()
        .map(|v| v.abs())
        .filter(|v| *v > 0.0)
        .fold(f64::INFINITY, f64::min);
    if hi == 0.0 || !lo.is_finite() {
        return Style::Fixed(0);
    }
    if hi / lo > 1e3 || hi >= 1e6 || lo < 1e-4 {
        return Style::Sci(2);
    }
    Style::Fixed((2 - lo.log10().floor() as i32).clamp(0, 6) as usize)
}

/// A whole number with comma thousands separators.
fn thousands(v: f64) -> String {
    let digits = format!("{:.0}", v.abs());
    let mut out = String::new();
    for (k, c) in digits.chars().enumerate() {
        if k > 0 && (digits.len() - k).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    if v < 0.0 {
        format!("-{out}")
    } else {
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn si_prefixes_follow_the_si_brochure() {
        // 1 ms = 1e-3 s, 168 MHz = 1.68e8 Hz (SI Brochure, 9th ed., table 7).
        let f = ColFmt::choose(&[1e-3], Quantity::Si("s"));
        assert_eq!(f.with_unit(1e-3), "1 ms");
        let f = ColFmt::choose(&[168e6], Quantity::Si("Hz"));
        assert_eq!(f.with_unit(168e6), "168 MHz");
        let f = ColFmt::choose(&[1.04e-4, 5e-5], Quantity::Si("s"));
        assert_eq!(f.unit(), "µs");
        assert_eq!(f.text(1.04e-4), "104");
        let f = ColFmt::choose(&[4691.0, 65536.0], Quantity::Si("B"));
        assert_eq!(f.with_unit(65536.0), "65,536 B");
    }

    #[test]
    fn one_format_per_column_and_fractions_as_percent() {
        // The column that mixed 0.1042 and 8.752e-3: one style for both.
        let f = ColFmt::choose(&[0.1042, 8.752e-3], Quantity::Plain("rad"));
        assert_eq!(
            (f.text(0.1042), f.text(8.752e-3)),
            ("0.10420".into(), "0.00875".into())
        );
        // A drift of 226.17 is 22,617 % and reads so.
        let f = ColFmt::choose(&[226.17, 1.2e-4], Quantity::Fraction);
        assert_eq!(f.unit(), "%");
        assert_eq!(f.text(226.17), "2.26e4");
        let f = ColFmt::choose(&[0.0234, 0.0051], Quantity::Fraction);
        assert_eq!(f.text(0.0234), "2.340");
        assert_eq!(thousands(-1234567.0), "-1,234,567");
        assert_eq!(f.text(f64::NAN), "-");
    }
}
