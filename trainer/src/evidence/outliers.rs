//! Outliers across a fleet by the modified z-score of Iglewicz and Hoaglin
//! (*How to Detect and Handle Outliers*, 1993): M = 0.6745 (x - median) / MAD,
//! MAD the median absolute deviation from the median, and |M| > 3.5 flags a
//! value. Median and MAD resist the very outliers being looked for, unlike
//! the mean and the standard deviation.

/// The threshold on |M| recommended by Iglewicz and Hoaglin.
pub const THRESHOLD: f64 = 3.5;

/// 0.6745, the 0.75 quantile of the standard normal: for normal data the
/// MAD is 0.6745 sigma, so M is on the scale of an ordinary z-score.
pub const SCALE: f64 = 0.6745;

/// The median (the mean of the two middle values for an even count); NaN
/// for no values.
pub fn median(values: &[f64]) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    match n {
        0 => f64::NAN,
        _ if n % 2 == 1 => v[n / 2],
        _ => 0.5 * (v[n / 2 - 1] + v[n / 2]),
    }
}

/// Median, MAD and each value's modified z-score. With MAD = 0 (more than
/// half the values equal) M is undefined and every score is None.
pub fn modified_z(values: &[f64]) -> (f64, f64, Vec<Option<f64>>) {
    let med = median(values);
    let dev: Vec<f64> = values.iter().map(|x| (x - med).abs()).collect();
    let mad = median(&dev);
    let scores = values
        .iter()
        .map(|x| (mad > 0.0 && mad.is_finite()).then(|| SCALE * (x - med) / mad))
        .collect();
    (med, mad, scores)
}

/// Whether a score flags its value.
pub fn is_outlier(score: Option<f64>) -> bool {
    score.is_some_and(|m| m.abs() > THRESHOLD)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked by hand (our own example, steps below), not taken from a book.
    /// x = 10, 12, 11, 13, 9, 30, 11. Sorted: 9 10 11 11 12 13 30, so the
    /// median is 11. |x - 11| = 1, 1, 0, 2, 2, 19, 0; sorted 0 0 1 1 2 2 19,
    /// so MAD = 1. M(30) = 0.6745 * 19 / 1 = 12.8155 (flagged);
    /// M(13) = 0.6745 * 2 = 1.349, M(9) = -1.349, M(10) = -0.6745,
    /// M(12) = 0.6745, M(11) = 0 (not flagged).
    #[test]
    fn odd_count_worked_by_hand() {
        let x = [10.0, 12.0, 11.0, 13.0, 9.0, 30.0, 11.0];
        let (med, mad, m) = modified_z(&x);
        assert_eq!((med, mad), (11.0, 1.0));
        let expect = [-0.6745, 0.6745, 0.0, 1.349, -1.349, 12.8155, 0.0];
        for (got, want) in m.iter().zip(expect) {
            assert!((got.unwrap() - want).abs() < 1e-12, "{got:?} vs {want}");
        }
        let flagged: Vec<bool> = m.iter().map(|s| is_outlier(*s)).collect();
        assert_eq!(flagged, [false, false, false, false, false, true, false]);
    }

    /// Also by hand, an even count: x = 1, 2, 3, 4, 100, 5. Sorted
    /// 1 2 3 4 5 100: median (3 + 4) / 2 = 3.5. |x - 3.5| = 2.5, 1.5, 0.5,
    /// 0.5, 96.5, 1.5; sorted 0.5 0.5 1.5 1.5 2.5 96.5: MAD = 1.5.
    /// M(100) = 0.6745 * 96.5 / 1.5 = 43.39283..., M(1) = 0.6745 * -2.5 / 1.5
    /// = -1.124166...
    #[test]
    fn even_count_worked_by_hand() {
        let (med, mad, m) = modified_z(&[1.0, 2.0, 3.0, 4.0, 100.0, 5.0]);
        assert_eq!((med, mad), (3.5, 1.5));
        assert!((m[4].unwrap() - 43.392_833_333_333_33).abs() < 1e-9);
        assert!((m[0].unwrap() + 1.124_166_666_666_667).abs() < 1e-12);
        assert!(is_outlier(m[4]) && !is_outlier(m[0]));
    }

    #[test]
    fn no_spread_gives_no_scores() {
        let (_, mad, m) = modified_z(&[2.0, 2.0, 2.0, 7.0]);
        assert_eq!(mad, 0.0);
        assert!(m.iter().all(Option::is_none));
    }
}
