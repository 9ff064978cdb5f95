//! The ranges of the project file's settings, checked when the file is read
//! (before the first stage of `visviva run`): every refusal names its table
//! and key, `[[export]]` tables by their name (`[[export]] 'rig-int8': dt`).
//! What needs the data as well (an integrator the model cannot use, the
//! reference system's kind) is checked by `pipeline::prepare`, still before
//! anything is written.

use anyhow::{bail, Result};

use crate::deploy::integrator::IntegratorOverrides;
use crate::learn::stage::{check_masses, check_time_step};
use crate::project::file::{ExportTarget, Project};

/// Export names that would overwrite `visviva run`'s own files in `out/`
/// (`model.vvb`; `fit.sha256`).
pub const RESERVED_EXPORT_NAMES: [&str; 2] = ["model", "fit"];

/// Every range check of the file.
pub fn check_ranges(p: &Project) -> Result<()> {
    check_data(p)?;
    if let Some(dt) = p.model.dt {
        check_time_step(dt, "[model] dt")?;
    }
    check_fit(p)?;
    check_check(p)?;
    for (k, e) in p.exports.iter().enumerate() {
        check_export(k + 1, e)?;
    }
    check_device(p)
}

fn check_data(p: &Project) -> Result<()> {
    let tol = p.data.step_tolerance;
    if !(tol.is_finite() && (0.0..1.0).contains(&tol)) {
        bail!("[data] step_tolerance = {tol}: must be a fraction in [0, 1)");
    }
    if let Some(m) = &p.data.masses {
        check_masses(m, "[data] masses")?;
    }
    if let Some(m) = p.data.reference_inertia {
        check_masses(&[m], "[data] reference_inertia")?;
        if p.data.masses.is_some() {
            bail!(
                "[data] reference_inertia is for joint rates without masses; with [data] masses \
                 the momenta are p = m v and need no other scale: remove one of the two keys"
            );
        }
    }
    Ok(())
}

fn check_fit(p: &Project) -> Result<()> {
    let lr = p.fit.lr;
    if !(lr.is_finite() && lr > 0.0) {
        bail!("[fit] lr = {lr}: the learning rate must be a finite number > 0");
    }
    Ok(())
}

fn check_check(p: &Project) -> Result<()> {
    let c = &p.check;
    for (key, v) in [
        ("horizon_steps", c.horizon_steps),
        ("golden_steps", c.golden_steps),
        ("golden_states", c.golden_states),
    ] {
        if v == 0 {
            bail!("[check] {key} = 0: must be at least 1 (a check of nothing proves nothing)");
        }
    }
    if let Some((k, v)) = c.reference_params.iter().find(|(_, v)| !v.is_finite()) {
        bail!("[check] reference_params.{k} = {v}: must be a finite number");
    }
    crate::evidence::horizons::check_horizons(&c.horizons, "[check] horizons")
}

/// One `[[export]]` table, the `k`-th (1-based) of the file.
fn check_export(k: usize, e: &ExportTarget) -> Result<()> {
    let table = format!("[[export]] '{}' (table {k})", e.name);
    if RESERVED_EXPORT_NAMES.contains(&e.name.as_str()) {
        bail!(
            "{table}: name = \"{}\" is taken by visviva run's own files in out/ \
             (model.vvb, fit.sha256); choose another name",
            e.name
        );
    }
    if e.qat == Some(true) && e.weights != crate::deploy::blob::WeightKind::Int8 {
        bail!("{table}: qat = true fine-tunes weights for int8 storage; this table stores f32 (weights = \"int8\" or drop qat)");
    }
    export_overrides(e).check(|key| format!("{table}: {key}"))
}

/// The integrator settings an `[[export]]` table overrides.
pub fn export_overrides(e: &ExportTarget) -> IntegratorOverrides {
    IntegratorOverrides {
        integrator: e.integrator,
        dt: e.dt,
        substeps: e.substeps,
        max_iterations: e.max_iterations,
        tolerance: e.tolerance,
    }
}

fn check_device(p: &Project) -> Result<()> {
    let d = &p.device;
    for (key, v, what) in [
        (
            "control_period_s",
            d.control_period_s,
            "seconds (0 = not judged)",
        ),
        (
            "cycles_per_mac",
            d.cycles_per_mac,
            "cycles (0 = the default 4)",
        ),
    ] {
        if !(v.is_finite() && v >= 0.0) {
            bail!("[device] {key} = {v}: must be a finite number of {what}, not negative");
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn refusal(text: &str) -> String {
        format!("{:#}", Project::parse(text).unwrap_err())
    }

    #[test]
    fn out_of_range_settings_name_table_and_key() {
        for (text, names) in [
            ("[[export]]\nname = \"a\"\ndt = 0.0\n", "'a' (table 1): dt"),
            (
                "[[export]]\nname = \"a\"\n[[export]]\nname = \"b\"\nsubsteps = 0\n",
                "'b' (table 2): substeps",
            ),
            (
                "[[export]]\nname = \"a\"\nmax_iterations = 0\n",
                "'a' (table 1): max_iterations = 0: must be in 1..=1000",
            ),
            (
                "[[export]]\nname = \"a\"\nmax_iterations = 1001\n",
                "'a' (table 1): max_iterations = 1001",
            ),
            (
                "[[export]]\nname = \"a\"\ntolerance = 0.0\n",
                "'a' (table 1): tolerance = 0",
            ),
            ("[[export]]\nname = \"model\"\n", "name = \"model\""),
            (
                "[[export]]\nname = \"a\"\nqat = true\n",
                "'a' (table 1): qat = true fine-tunes weights for int8 storage",
            ),
            (
                "[device]\ncontrol_period_s = -0.001\n",
                "[device] control_period_s",
            ),
            (
                "[device]\ncycles_per_mac = -4.0\n",
                "[device] cycles_per_mac",
            ),
            ("[model]\ndt = -0.01\n", "[model] dt"),
            ("[fit]\nlr = 0.0\n", "[fit] lr"),
            ("[check]\ngolden_states = 0\n", "[check] golden_states"),
            ("[check]\nhorizons = [1.0, -5.0]\n", "[check] horizons = -5"),
            (
                "[check]\nhorizons = [1.0, 1.0]\n",
                "[check] horizons: 1 s given twice",
            ),
            ("[data]\nmasses = [1e-40]\n", "[data] masses"),
            ("[data]\nstep_tolerance = -1.0\n", "[data] step_tolerance"),
        ] {
            let msg = refusal(text);
            assert!(msg.contains(names), "{text}: {msg}");
        }
        // In range: accepted.
        let p = Project::parse(
            "[[export]]\nname = \"a\"\ndt = 0.001\nsubsteps = 4\nmax_iterations = 3\ntolerance = 1e-5\n",
        )
        .unwrap();
        assert_eq!(p.exports[0].max_iterations, Some(3));
    }
}
