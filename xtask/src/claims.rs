//! `cargo xtask claims`: every percentage or tolerance figure in README.md's
//! prose (outside code blocks and indented command lines) with the test
//! that asserts it, or why none does ("one run": a measurement; "setting":
//! an input, not a result). Driven by [`CLAIMS`]; fails when the README
//! holds a figure the table does not list, when a table entry matches no
//! README line, or when an entry names a test that is not in the tree.

use anyhow::{Context, Result};

/// How a figure is backed.
pub enum Backing {
    /// `path::name`: a `fn name(` or `const name:` in that file asserts it.
    Test(&'static str),
    /// One run's measurement, labelled so in the README.
    OneRun,
    /// An input or a derived fact, not a measured result (why).
    Setting(&'static str),
}

/// A README figure: its text as the scanner extracts it, a phrase that
/// appears on the same README line, and its backing.
pub struct Claim {
    pub figure: &'static str,
    pub context: &'static str,
    pub backing: Backing,
}

/// The table. Keep it in README order.
pub const CLAIMS: &[Claim] = &[
    Claim {
        figure: "0.2 %",
        context: "noise",
        backing: Backing::Setting("the crane demo log's --noise 0.002"),
    },
    Claim {
        figure: "1e-3",
        context: "true-energy drift",
        backing: Backing::Test("tests/tests/massspring_energy.rs::energy_model_keeps_true_energy_over_100_periods_and_baseline_drifts"),
    },
    Claim {
        figure: "90 %",
        context: "the baseline's at",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "median by more than",
        backing: Backing::Setting("default of [data] step_tolerance"),
    },
    Claim {
        figure: "0.5 %",
        context: "K(sin 45 deg) each within",
        backing: Backing::Test("tests/tests/rig_logs.rs::encoder_logged_pendulum_has_the_closed_form_periods_and_trajectory_matching_beats_derivatives"),
    },
    Claim {
        figure: "+0.35 %",
        context: "at 5 deg",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "-0.050 %",
        context: "at 90 deg",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "positions with 1 % noise",
        backing: Backing::Setting("the noise level of the release check's mass-spring log"),
    },
    Claim {
        figure: "0.5 %",
        context: "sqrt(k/m) within",
        backing: Backing::Test("tests/tests/rig_logs.rs::mass_spring_logged_in_millimetres_with_noise_has_the_natural_frequency"),
    },
    Claim {
        figure: "-0.052 %",
        context: "sqrt(k/m) within 0.5 % (one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "9.0e-3",
        context: "one run: 9.0e-3 rad/s against",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "4.4e-2",
        context: "one run: 9.0e-3 rad/s against",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.6e-1",
        context: "one run: 9.0e-3 rad/s against",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2 %",
        context: "double-pendulum`): the fitted M(q) within",
        backing: Backing::Test("tests/tests/double_pendulum.rs::fitted_mechanical_model_has_the_double_pendulum_mass_matrix_and_modes"),
    },
    Claim {
        figure: "1.1 %",
        context: "held-out log (one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "small-oscillation frequencies within",
        backing: Backing::Test("tests/tests/double_pendulum.rs::fitted_mechanical_model_has_the_double_pendulum_mass_matrix_and_modes"),
    },
    Claim {
        figure: "-0.25 %",
        context: "pendulum's (one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "+0.10 %",
        context: "pendulum's (one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2 %",
        context: "the constant m l^2): the fitted M(q) within",
        backing: Backing::Test("tests/tests/crane_cart.rs::fitted_mechanical_model_has_the_cart_pendulum_mass_matrix_and_swing"),
    },
    Claim {
        figure: "0.46 %",
        context: "worst at its largest angle",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "hanging rest within",
        backing: Backing::Test("tests/tests/crane_cart.rs::fitted_mechanical_model_has_the_cart_pendulum_mass_matrix_and_swing"),
    },
    Claim {
        figure: "-0.12 %",
        context: "linearized cart-pendulum's (one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2 %",
        context: "learned from the rates within",
        backing: Backing::Test("tests/tests/joint_rates.rs::mass_matrix_learned_from_joint_rates_matches_the_double_pendulum"),
    },
    Claim {
        figure: "0.86 %",
        context: "0.86 %), and with default settings",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "5.9e-3",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.8e-2",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2.2e-2",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "9.6e-2",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.1e-1",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "5.7e-1",
        context: "(one run, model vs baseline:",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.05 %",
        context: "logarithmic decrement",
        backing: Backing::Test("trainer/tests/port_checks.rs::damped_flexure_log_decrement_gives_the_simulated_damping_ratio"),
    },
    Claim {
        figure: "0.01 %",
        context: "simulated 0.05",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "torque / b",
        backing: Backing::Test("trainer/tests/port_checks.rs::drivetrain_steady_speed_is_torque_over_friction"),
    },
    Claim {
        figure: "0.19 %",
        context: "torque / b",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2 x 10^4",
        context: "random states",
        backing: Backing::Test("trainer/tests/port_checks.rs::drivetrain_steady_speed_is_torque_over_friction"),
    },
    Claim {
        figure: "1 %",
        context: "-atan(a / g) within",
        backing: Backing::Test("trainer/tests/port_checks.rs::crane_under_a_trolley_settles_at_the_effective_gravity_angle"),
    },
    Claim {
        figure: "0.56 %",
        context: "-atan(a / g) within",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "13 %",
        context: "-asin(a / g)",
        backing: Backing::Setting("arithmetic of the two closed forms at 0.5 g"),
    },
    Claim {
        figure: "2 %",
        context: "G(q) stays within",
        backing: Backing::Test("trainer/tests/port_checks.rs::crane_under_a_trolley_settles_at_the_effective_gravity_angle"),
    },
    Claim {
        figure: "0.70 %",
        context: "other seeds",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.96 %",
        context: "other seeds",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "5 %",
        context: "(one run: 3.6 %)",
        backing: Backing::Test("trainer/tests/port_checks.rs::squeeze_film_damping_is_learned_as_a_function_of_the_gap"),
    },
    Claim {
        figure: "3.6 %",
        context: "(one run: 3.6 %)",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.10 %",
        context: "learned shaft mode",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.15 %",
        context: "off the simulated",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.3 %",
        context: "asserts the shaft mode",
        backing: Backing::Test("xtask/src/demo_modes.rs::HEADLINES"),
    },
    Claim {
        figure: "0.6 %",
        context: "of the closed form",
        backing: Backing::Test("xtask/src/demo_modes.rs::HEADLINES"),
    },
    Claim {
        figure: "37 %",
        context: "int8 blob",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "10^4",
        context: "normalization scales",
        backing: Backing::Setting("the export's measurement horizon"),
    },
    Claim {
        figure: "0.3 %",
        context: "swing mode within",
        backing: Backing::Test("xtask/src/demo_modes.rs::HEADLINES"),
    },
    Claim {
        figure: "0.6 %",
        context: "damping ratio within",
        backing: Backing::Test("xtask/src/demo_modes.rs::HEADLINES"),
    },
    Claim {
        figure: "2.79e-2",
        context: "sequences was",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2.99e-2",
        context: "against the baseline's",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1 %",
        context: "two-sided false-alarm rate (default",
        backing: Backing::Setting("tune-observer's default --false-alarm"),
    },
    Claim {
        figure: "1.885e-3",
        context: "(1.885e-3 rad; five held-out",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1e-3",
        context: "training logs with noise of",
        backing: Backing::Setting("the position noise trainer/tests/observer_damped.rs adds"),
    },
    Claim {
        figure: "7.58e-3",
        context: "trolley crane",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.57e-2",
        context: "trolley crane",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "5.62e-2",
        context: "constant-velocity filter; servo",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "4.31e-2",
        context: "constant-velocity filter; servo",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.39e-1",
        context: "against 1.39e-1",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.89e-1",
        context: "against 1.39e-1",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3 %",
        context: "(trolley, 3 %",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.5 %",
        context: "nominal 0.5 %) and",
        backing: Backing::Setting("the upper tail's share of the default two-sided 1 % false-alarm rate"),
    },
    Claim {
        figure: "3.41e-2",
        context: "observer's implicit-midpoint case) gets",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2.09e-2",
        context: "baseline's 2.09e-2 and is flagged",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "7.28e-3",
        context: "got 7.28e-3 in one run",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.25e-2",
        context: "driven state error 3.25e-2",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.36e-2",
        context: "against 3.36e-2, at 1 s",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "4.04e-2",
        context: "against 3.36e-2, at 1 s",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.98e-2",
        context: "against 3.36e-2, at 1 s",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.72e-2",
        context: "(1.72e-2 against 1.66e-2",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.66e-2",
        context: "(1.72e-2 against 1.66e-2",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.14e-3",
        context: "drift 1.14e-3 against",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.13e-3",
        context: "drift 1.14e-3 against",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.35e-2",
        context: "the flexure's (3.35e-2",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "3.41e-2",
        context: "the flexure's (3.35e-2",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "65 %",
        context: "product kernel takes about",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "70 %",
        context: "of the AVX-512 bound",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1.862e-3",
        context: "observer",
        backing: Backing::Test("trainer/tests/observer_crane.rs::observer_velocity_beats_finite_differences_and_the_cv_filter"),
    },
    Claim {
        figure: "2.666e-2",
        context: "(14 times larger)",
        backing: Backing::Test("trainer/tests/observer_crane.rs::observer_velocity_beats_finite_differences_and_the_cv_filter"),
    },
    Claim {
        figure: "3.939e-2",
        context: "velocity on other trajectories",
        backing: Backing::Test("trainer/tests/observer_crane.rs::observer_velocity_beats_finite_differences_and_the_cv_filter"),
    },
    Claim {
        figure: "1 %",
        context: "(0.5 % of the full windows)",
        backing: Backing::Setting("the fault demos' false-alarm rate"),
    },
    Claim {
        figure: "0.5 %",
        context: "of the full windows",
        backing: Backing::Test("trainer/tests/observer_faults.rs::crane_rope_paid_out_is_detected_without_false_alarms"),
    },
    Claim {
        figure: "10 %",
        context: "within 10 % of the full windows",
        backing: Backing::Test("trainer/tests/observer_faults.rs::LOWER_FLAG_BOUND"),
    },
    Claim {
        figure: "65 %",
        context: "were 1303",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "0.5 %",
        context: "their nominal 0.5 % share",
        backing: Backing::Setting("the lower tail's half of the 1 % two-sided rate"),
    },
    Claim {
        figure: "3.3 %",
        context: "crane 3.3 %",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "6.0 %",
        context: "flexure 6.0 %",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2 %",
        context: "ropes are within",
        backing: Backing::Setting("the demo fleet's rope lengths, xtask/src/fleet_check.rs UNITS"),
    },
    Claim {
        figure: "15 %",
        context: "longer (9.2 m)",
        backing: Backing::Setting("crane-07's rope length, xtask/src/fleet_check.rs UNITS"),
    },
    Claim {
        figure: "3.5e-2",
        context: "validation loss of",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1e-6",
        context: "is round-off (about 1e-6 rad)",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "2.6e-4",
        context: "or less",
        backing: Backing::OneRun,
    },
    Claim {
        figure: "1e-13",
        context: "relative tolerance",
        backing: Backing::Setting("the simulator's integration tolerance"),
    },
    Claim {
        figure: "1e-10",
        context: "relative tolerance",
        backing: Backing::Test("trainer/tests/simulate.rs::agrees_with_ode_solvers_dop853"),
    },
    Claim {
        figure: "1e-3",
        context: "Adam lr",
        backing: Backing::Setting("the benchmark's learning rate"),
    },
    Claim {
        figure: "10^7",
        context: "log of 10^7 samples",
        backing: Backing::Setting(
            "the benchmark's large log, xtask/src/bench_large.rs TRAJECTORIES x SAMPLES",
        ),
    },
    Claim {
        figure: "5 %",
        context: "table by more than",
        backing: Backing::Setting("the footprint check's margin (xtask/src/footprint.rs MARGIN_FRACTION)"),
    },
    Claim {
        figure: "10^5",
        context: "cases per surface",
        backing: Backing::Test("trainer/tests/fuzz_host.rs::CASES"),
    },
    Claim {
        figure: "10^7-step",
        context: "visviva rollout --bits --out",
        backing: Backing::Test(
            "trainer/tests/rollout_memory.rs::long_rollouts_and_export_checks_stay_within_a_few_megabytes",
        ),
    },
];

/// Figures on one prose line: numbers directly before " %" or "%",
/// scientific numbers like 1e-3, and powers like 10^5 or 2 x 10^4.
pub fn figures(line: &str) -> Vec<String> {
    let words: Vec<&str> = line.split_whitespace().collect();
    let mut out = Vec::new();
    let trim = |w: &str| {
        w.trim_matches(|c: char| "(),;:.".contains(c) && c != '%')
            .to_string()
    };
    for (i, raw) in words.iter().enumerate() {
        let w = trim(raw);
        let is_num = |s: &str| !s.is_empty() && s.parse::<f64>().is_ok();
        if w == "%" && i > 0 && is_num(&trim(words[i - 1])) {
            out.push(format!("{} %", trim(words[i - 1])));
        } else if let Some(n) = w.strip_suffix('%').filter(|n| is_num(n)) {
            out.push(format!("{n} %"));
        } else if w.contains('e')
            && is_num(&w)
            && w.chars().next().is_some_and(|c| c.is_ascii_digit())
        {
            out.push(w);
        } else if w.starts_with("10^") {
            if i >= 2 && words[i - 1] == "x" && is_num(&trim(words[i - 2])) {
                out.push(format!("{} x {w}", trim(words[i - 2])));
            } else {
                out.push(w);
            }
        }
    }
    out
}

/// README prose lines (1-based number, text): fenced code blocks and lines
/// indented by four or more spaces (commands) are left out.
fn prose_lines(text: &str) -> Vec<(usize, &str)> {
    let mut fenced = false;
    let mut out = Vec::new();
    for (i, line) in text.lines().enumerate() {
        if line.trim_start().starts_with("```") {
            fenced = !fenced;
            continue;
        }
        if !fenced && !line.starts_with("    ") {
            out.push((i + 1, line));
        }
    }
    out
}

/// Whether `path::name` names a function or constant in the tree.
fn test_exists(root: &std::path::Path, target: &str) -> bool {
    let Some((path, name)) = target.rsplit_once("::") else {
        return false;
    };
    std::fs::read_to_string(root.join(path)).is_ok_and(|src| {
        src.contains(&format!("fn {name}(")) || src.contains(&format!("const {name}:"))
    })
}

/// Print the listing; Ok(false) on an unlisted figure, an unused entry or
/// a missing test.
pub fn run() -> Result<bool> {
    let root = crate::workspace_root();
    let readme = root.join("README.md");
    let text = std::fs::read_to_string(&readme)
        .with_context(|| format!("reading {}", readme.display()))?;
    let mut ok = true;
    let mut used = vec![false; CLAIMS.len()];
    println!("README.md figures and what backs them:");
    for (n, line) in prose_lines(&text) {
        for fig in figures(line) {
            let hit = CLAIMS
                .iter()
                .position(|c| c.figure == fig && line.contains(c.context));
            let Some(k) = hit else {
                println!("  line {n}: {fig}: NOT IN THE TABLE (xtask/src/claims.rs)");
                ok = false;
                continue;
            };
            used[k] = true;
            let what = match CLAIMS[k].backing {
                Backing::Test(t) if test_exists(&root, t) => format!("asserted by {t}"),
                Backing::Test(t) => {
                    ok = false;
                    format!("MISSING TEST {t}")
                }
                Backing::OneRun => "one run's measurement".into(),
                Backing::Setting(why) => format!("setting: {why}"),
            };
            println!("  line {n}: {fig}: {what}");
        }
    }
    for (c, _) in CLAIMS.iter().zip(&used).filter(|(_, u)| !**u) {
        println!(
            "  table entry {} ({:?}) matches no README line",
            c.figure, c.context
        );
        ok = false;
    }
    println!(
        "claims: {}",
        if ok { "every figure listed" } else { "FAILED" }
    );
    Ok(ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn figures_are_found_in_prose() {
        let f = figures("within 0.5 % (one run 0.19 %), 2 x 10^4 states, 1e-3 drift, 37% size");
        assert_eq!(f, ["0.5 %", "0.19 %", "2 x 10^4", "1e-3", "37 %"]);
        assert!(figures("version 3, 12.30 Hz, e-mail").is_empty());
    }

    #[test]
    fn every_named_test_exists_and_a_wrong_name_is_caught() {
        let root = crate::workspace_root();
        for c in CLAIMS {
            if let Backing::Test(t) = c.backing {
                assert!(test_exists(&root, t), "{t}");
            }
        }
        assert!(!test_exists(
            &root,
            "trainer/tests/port_checks.rs::no_such_test"
        ));
    }

    #[test]
    fn code_blocks_and_command_lines_are_not_prose() {
        let text = "a 1 %\n```text\nb 2 %\n```\n    c 3 %\nd 4 %";
        let lines: Vec<usize> = prose_lines(text).iter().map(|(n, _)| *n).collect();
        assert_eq!(lines, [1, 6]);
    }
}
