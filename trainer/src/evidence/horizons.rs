//! State errors at user-chosen horizons (seconds after a held-out
//! trajectory's first sample), model and baseline side by side: the
//! relative state error of the rollout at the logged sample nearest
//! t0 + h (within half a sampling interval). A horizon longer than the
//! trajectory is reported as not reached, never clipped to its end; a
//! rollout that stopped before it has no error there. Also the range check
//! of the horizons (`--horizons`, `[check] horizons`).

use anyhow::{bail, Result};
use serde::Serialize;

/// The horizons a check reports by default (s).
pub const DEFAULT_HORIZONS: [f64; 3] = [1.0, 5.0, 20.0];

/// Most horizons one check reports.
pub const MAX_HORIZONS: usize = 16;

/// Longest horizon accepted (s): a day.
pub const MAX_HORIZON_S: f64 = 86_400.0;

/// One trajectory's errors at one horizon.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct HorizonError {
    /// The horizon (s after the trajectory's first sample).
    pub seconds: f64,
    /// Whether the held-out trajectory lasts that long (to within half a
    /// sampling interval); when not, no error is given.
    pub reached: bool,
    /// Time of the logged sample the errors are taken at (s after the
    /// first sample).
    pub at_s: Option<f64>,
    /// The model's relative state error there (`None`: not reached, or the
    /// rollout stopped before it).
    pub model: Option<f64>,
    /// The baseline's, when there is a baseline.
    pub baseline: Option<f64>,
}

/// Medians over the trajectories that reach one horizon.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct HorizonSummary {
    /// The horizon (s).
    pub seconds: f64,
    /// Trajectories long enough to reach it.
    pub reached: usize,
    /// Median model error over them (a rollout that stopped before the
    /// horizon counts as infinitely wrong; `None` when none reached it or
    /// the median is such a rollout).
    pub median_model: Option<f64>,
    /// Median baseline error, likewise.
    pub median_baseline: Option<f64>,
}

/// Refuse horizons that are not finite, not positive, longer than a day,
/// repeated, or too many; `key` names the flag or key.
pub fn check_horizons(h: &[f64], key: &str) -> Result<()> {
    if h.len() > MAX_HORIZONS {
        bail!("{key}: {} horizons: at most {MAX_HORIZONS}", h.len());
    }
    for (k, v) in h.iter().enumerate() {
        if !(v.is_finite() && *v > 0.0 && *v <= MAX_HORIZON_S) {
            bail!("{key} = {v}: a horizon must be a number of seconds in (0, {MAX_HORIZON_S}]");
        }
        if h[..k].contains(v) {
            bail!("{key}: {v} s given twice");
        }
    }
    Ok(())
}

/// The logged sample at `t0 + h` (within half the sampling interval
/// `dt`), if the trajectory `t` reaches it.
fn sample_at(t: &[f64], dt: f64, h: f64) -> Option<usize> {
    let t0 = *t.first()?;
    let end = *t.last()? - t0;
    if end < h - 0.5 * dt {
        return None;
    }
    let k = t.partition_point(|ti| ti - t0 < h - 0.5 * dt);
    (k < t.len()).then_some(k)
}

/// The errors at each horizon of one trajectory with times `t` (s) and
/// sampling interval `dt`, from the per-sample relative state errors of
/// the model and the baseline rollouts (shorter when a rollout stopped).
pub fn errors_at(
    t: &[f64],
    dt: f64,
    model: &[f64],
    baseline: Option<&[f64]>,
    horizons: &[f64],
) -> Vec<HorizonError> {
    horizons
        .iter()
        .map(|&h| match sample_at(t, dt, h) {
            Some(k) => HorizonError {
                seconds: h,
                reached: true,
                at_s: Some(t[k] - t[0]),
                model: model.get(k).copied(),
                baseline: baseline.and_then(|b| b.get(k).copied()),
            },
            None => HorizonError {
                seconds: h,
                reached: false,
                at_s: None,
                model: None,
                baseline: None,
            },
        })
        .collect()
}

/// The median of `v` (a stopped rollout as +infinity); `None` when empty
/// or infinite.
fn median(mut v: Vec<f64>) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    v.sort_by(|a, b| a.total_cmp(b));
    Some(v[v.len() / 2]).filter(|m| m.is_finite())
}

/// Medians per horizon over trajectories' errors (`per_trajectory[i]` in
/// the order of `horizons`); `with_baseline` when a baseline was rolled
/// out.
pub fn summarize(
    per_trajectory: &[&[HorizonError]],
    horizons: &[f64],
    with_baseline: bool,
) -> Vec<HorizonSummary> {
    horizons
        .iter()
        .enumerate()
        .map(|(j, &h)| {
            let reached: Vec<&HorizonError> = per_trajectory
                .iter()
                .filter_map(|t| t.get(j))
                .filter(|e| e.reached)
                .collect();
            let of = |f: &dyn Fn(&HorizonError) -> Option<f64>| {
                median(
                    reached
                        .iter()
                        .map(|e| f(e).unwrap_or(f64::INFINITY))
                        .collect(),
                )
            };
            HorizonSummary {
                seconds: h,
                reached: reached.len(),
                median_model: of(&|e| e.model),
                median_baseline: if with_baseline {
                    of(&|e| e.baseline)
                } else {
                    None
                },
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn horizons_pick_the_sample_at_that_time_and_never_clip() {
        // 0.1 s sampling over 2.0 s (21 samples), errors 0, 0.01, 0.02, ...
        let t: Vec<f64> = (0..21).map(|k| 3.0 + 0.1 * k as f64).collect();
        let model: Vec<f64> = (0..21).map(|k| 0.01 * k as f64).collect();
        // The baseline stopped after 12 samples (t = 1.1 s).
        let base: Vec<f64> = (0..12).map(|k| 0.1 * k as f64).collect();
        let e = errors_at(&t, 0.1, &model, Some(&base), &[0.5, 1.5, 2.0, 2.04, 2.1]);
        // 0.5 s: sample 5.
        assert_eq!(e[0].model, Some(0.05));
        assert_eq!(e[0].baseline, Some(0.5));
        assert!((e[0].at_s.unwrap() - 0.5).abs() < 1e-12);
        // 1.5 s: sample 15; the baseline had stopped.
        assert_eq!((e[1].model, e[1].baseline), (Some(0.15), None));
        assert!(e[1].reached);
        // 2.0 s and 2.04 s (within half an interval): the last sample.
        assert_eq!(e[2].model, Some(0.2));
        assert_eq!(e[3].model, Some(0.2));
        // 2.1 s is past the end: not reached, no number.
        assert_eq!(
            e[4],
            HorizonError {
                seconds: 2.1,
                reached: false,
                at_s: None,
                model: None,
                baseline: None
            }
        );
        let s = summarize(&[&e, &e[..4]], &[0.5, 1.5, 2.0, 2.04, 2.1], true);
        assert_eq!(s[0].reached, 2);
        assert_eq!(s[0].median_model, Some(0.05));
        // The stopped baseline counts as infinitely wrong.
        assert_eq!(s[1].median_baseline, None);
        assert_eq!((s[4].reached, s[4].median_model), (0, None));
    }

    #[test]
    fn horizons_out_of_range_are_refused_naming_the_key() {
        assert!(check_horizons(&[1.0, 5.0, 20.0], "--horizons").is_ok());
        for bad in [
            vec![0.0],
            vec![-1.0],
            vec![f64::NAN],
            vec![1e6],
            vec![1.0, 1.0],
        ] {
            let e = check_horizons(&bad, "[check] horizons").unwrap_err();
            assert!(e.to_string().starts_with("[check] horizons"), "{e}");
        }
        assert!(check_horizons(&[1.0; 17], "--horizons").is_err());
    }
}
