//! Terminal tables shared by the commands that print check results.

use crate::evidence::check::CheckReport;
use crate::evidence::horizons::{HorizonError, HorizonSummary};
use crate::evidence::report::PortReport;

pub fn sci(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.2e}")
    } else {
        "failed".into()
    }
}

fn opt(v: Option<f64>) -> String {
    v.map(sci).unwrap_or_else(|| "-".into())
}

/// Print the compact table.
pub fn print_table(r: &CheckReport) {
    let energy = if r.system.is_some() {
        "true-energy drift"
    } else {
        "learned-energy drift"
    };
    println!(
        "{:<10} {:>22} {:>22} {:>26}",
        "trajectory", "vector-field rel. RMSE", "state rel. RMSE", energy
    );
    println!(
        "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
        "", "model", "baseline", "model", "baseline", "model", "baseline"
    );
    for t in &r.trajectories {
        let b = t.baseline.as_ref();
        let (de_m, de_b) = if r.system.is_some() {
            (
                t.model.true_energy_drift,
                b.and_then(|b| b.true_energy_drift),
            )
        } else {
            (t.model.learned_energy_drift, None)
        };
        println!(
            "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
            t.id,
            sci(t.model.vector_field_rel_rmse),
            opt(b.map(|b| b.vector_field_rel_rmse)),
            sci(t.model.state_rel_rmse),
            opt(b.map(|b| b.state_rel_rmse)),
            opt(de_m),
            opt(de_b),
        );
    }
    let m = &r.median_model;
    let b = r.median_baseline.as_ref();
    println!(
        "{:<10} {:>11}{:>11} {:>11}{:>11} {:>13}{:>13}",
        "median",
        sci(m.vector_field_rel_rmse),
        opt(b.map(|b| b.vector_field_rel_rmse)),
        sci(m.state_rel_rmse),
        opt(b.map(|b| b.state_rel_rmse)),
        opt(if r.system.is_some() {
            m.true_energy_drift
        } else {
            m.learned_energy_drift
        }),
        opt(if r.system.is_some() {
            b.and_then(|b| b.true_energy_drift)
        } else {
            None
        }),
    );
    if let Some(t) = r.trajectories.first() {
        println!(
            "model stepped with {} at the log's interval ({} s); long horizon {} steps",
            r.integrator, t.dt, t.horizon_steps
        );
    }
    let ids: Vec<&str> = r.trajectories.iter().map(|t| t.id.as_str()).collect();
    let per: Vec<&[HorizonError]> = r
        .trajectories
        .iter()
        .map(|t| t.horizons.as_slice())
        .collect();
    print_horizons(&ids, &per, &r.horizons, r.median_baseline.is_some());
    for t in &r.trajectories {
        for (who, m) in [("model", Some(&t.model)), ("baseline", t.baseline.as_ref())] {
            if let Some(f) = m.and_then(|m| m.failure.as_ref()) {
                println!(
                    "note: {who} rollout of trajectory {} stopped early: {f}",
                    t.id
                );
            }
        }
    }
}

/// The state errors at the chosen horizons: per trajectory `ids[i]` with
/// errors `per[i]` (model / baseline, "not reached" when the trajectory is
/// shorter), then the median over the trajectories that reach it.
pub fn print_horizons(
    ids: &[&str],
    per: &[&[HorizonError]],
    summary: &[HorizonSummary],
    with_baseline: bool,
) {
    if summary.is_empty() {
        return;
    }
    println!("relative state error at horizons (model / baseline):");
    let stopped = |v: Option<f64>| v.map(sci).unwrap_or_else(|| "stopped".into());
    for (j, s) in summary.iter().enumerate() {
        let each: Vec<String> = ids
            .iter()
            .zip(per)
            .map(|(id, errs)| match errs.get(j) {
                Some(e) if e.reached => {
                    let b = if with_baseline {
                        stopped(e.baseline)
                    } else {
                        "-".into()
                    };
                    format!("{id} {} / {b}", stopped(e.model))
                }
                _ => format!("{id} not reached"),
            })
            .collect();
        println!(
            "  {} s: median {} / {} over {} of {} trajectories reaching it ({})",
            s.seconds,
            opt(s.median_model),
            opt(s.median_baseline),
            s.reached,
            ids.len(),
            each.join(", ")
        );
    }
}

/// Print the damped or driven model's check.
pub fn print_port(r: &PortReport) {
    println!(
        "      {:<6} {:>18} {:>14} {:>30}",
        "mode", "natural freq (Hz)", "damping ratio", "reference system (Hz, ratio)"
    );
    for (k, m) in r.modes.iter().enumerate() {
        let reference = r
            .reference_modes
            .as_ref()
            .and_then(|v| v.get(k))
            .map_or("-".into(), |m| {
                format!("{:.4}, {:.4}", m.natural_hz, m.damping_ratio)
            });
        println!(
            "      {:<6} {:>18.4} {:>14.4} {:>30}",
            k + 1,
            m.natural_hz,
            m.damping_ratio,
            reference
        );
    }
    println!(
        "      {:<10} {:>26} {:>12}",
        "trajectory", "driven state rel. RMSE", "baseline"
    );
    for d in &r.driven {
        let show = |v: f64, f: &Option<String>| {
            if f.is_some() {
                "failed".to_string()
            } else {
                format!("{v:.2e}")
            }
        };
        println!(
            "      {:<10} {:>26} {:>12}",
            d.id,
            show(d.model_state_rel_rmse, &d.model_failure),
            d.baseline_state_rel_rmse
                .map_or("-".into(), |b| show(b, &d.baseline_failure)),
        );
    }
}
