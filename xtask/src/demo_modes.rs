//! The damped demo projects' headline figures, asserted by `cargo xtask
//! demos --verify`: the learned mode in each project's `out/report.json`
//! against the simulated system's mode computed here in closed form from the
//! system's parameters (no code shared with the trainer, which gets its
//! reference modes from its own eigenvalue routine).

use std::path::Path;

use anyhow::{bail, Context, Result};
use serde_json::Value;

/// One asserted mode: demo folder, rank of the learned mode (by natural
/// frequency, as the report lists them), the closed-form reference
/// (natural frequency in Hz, damping ratio) and the relative tolerances
/// asserted on each.
pub struct Headline {
    pub demo: &'static str,
    pub what: &'static str,
    pub rank: usize,
    pub reference: fn() -> (f64, f64),
    pub tol_hz: f64,
    pub tol_zeta: f64,
}

/// The asserted figures. Tolerances: README figure (one run) times about 3,
/// so a regression several times worse fails (measured values are printed
/// by every run and listed in README.md).
pub const HEADLINES: &[Headline] = &[
    Headline {
        demo: "servo-drivetrain",
        what: "shaft mode",
        rank: 1,
        reference: drivetrain_shaft_mode,
        tol_hz: 0.003,
        tol_zeta: 0.006,
    },
    Headline {
        demo: "trolley-crane",
        what: "swing mode",
        rank: 0,
        reference: trolley_swing_mode,
        tol_hz: 0.003,
        tol_zeta: 0.006,
    },
];

/// The trolley crane's rope: m l^2 q'' + c q' + m g l q = 0 with
/// c = 2 zeta m l^2 sqrt(g / l) (the scenario's definition of its damping
/// ratio; defaults m = 2 kg, l = 1 m, g = 9.81 m/s^2, zeta = 0.05), so the
/// linearized pendulum's natural frequency is sqrt(g / l) / (2 pi) and its
/// damping ratio zeta (small-angle pendulum, any dynamics text; from memory).
fn trolley_swing_mode() -> (f64, f64) {
    let (l, g, zeta) = (1.0f64, 9.81f64, 0.05f64);
    ((g / l).sqrt() / (2.0 * std::f64::consts::PI), zeta)
}

/// The servo drivetrain (defaults Jm = 2e-4, Jl = 1e-3 kg m^2, shaft
/// k = 1 N m/rad, c = 2e-3 N m s/rad, load friction b = 1e-2 N m s/rad):
/// det [[Jm s^2 + c s + k, -(c s + k)], [-(c s + k), Jl s^2 + (c + b) s + k]]
/// = s (Jm Jl s^3 + (Jm (c + b) + Jl c) s^2 + (k (Jm + Jl) + c b) s + k b),
/// whose cubic factor's complex pair (Cardano's formula) is the shaft mode.
fn drivetrain_shaft_mode() -> (f64, f64) {
    let (jm, jl, k, c, b) = (2e-4f64, 1e-3f64, 1.0f64, 2e-3f64, 1e-2f64);
    let lead = jm * jl;
    let (re, im) = cubic_complex_pair(
        (jm * (c + b) + jl * c) / lead,
        (k * (jm + jl) + c * b) / lead,
        k * b / lead,
    );
    let w = re.hypot(im);
    (w / (2.0 * std::f64::consts::PI), -re / w)
}

/// The complex pair (real part, positive imaginary part) of
/// s^3 + a s^2 + b s + c with one real root: with s = t - a / 3,
/// t^3 + p t + q = 0, u, v = cbrt(-q / 2 +- sqrt(q^2 / 4 + p^3 / 27)), the
/// pair is -(u + v) / 2 +- i sqrt(3) (u - v) / 2 (Cardano's formula).
fn cubic_complex_pair(a: f64, b: f64, c: f64) -> (f64, f64) {
    let p = b - a * a / 3.0;
    let q = 2.0 * a * a * a / 27.0 - a * b / 3.0 + c;
    let disc = (q * q / 4.0 + p * p * p / 27.0).sqrt();
    let (u, v) = ((-q / 2.0 + disc).cbrt(), (-q / 2.0 - disc).cbrt());
    (-(u + v) / 2.0 - a / 3.0, 3f64.sqrt() * (u - v).abs() / 2.0)
}

fn mode_of(report: &Value, rank: usize) -> Option<(f64, f64)> {
    let m = report.pointer(&format!("/port/modes/{rank}"))?;
    Some((
        m.get("natural_hz")?.as_f64()?,
        m.get("damping_ratio")?.as_f64()?,
    ))
}

/// Check every headline mode of `demo` against its reference; prints one
/// line per figure. Ok(false) when one is outside its tolerance.
pub fn check(demo: &str, dir: &Path) -> Result<bool> {
    let mut ok = true;
    for h in HEADLINES.iter().filter(|h| h.demo == demo) {
        let path = dir.join("out/report.json");
        let text = std::fs::read_to_string(&path)
            .with_context(|| format!("reading {}", path.display()))?;
        let report: Value =
            serde_json::from_str(&text).with_context(|| format!("parsing {}", path.display()))?;
        let Some((hz, zeta)) = mode_of(&report, h.rank) else {
            bail!(
                "{}: no port/modes/{} with natural_hz and damping_ratio",
                path.display(),
                h.rank
            );
        };
        let (ref_hz, ref_zeta) = (h.reference)();
        let (e_hz, e_zeta) = (
            (hz - ref_hz).abs() / ref_hz,
            (zeta - ref_zeta).abs() / ref_zeta,
        );
        let pass = e_hz <= h.tol_hz && e_zeta <= h.tol_zeta;
        println!(
            "  {}: {hz:.4} Hz, damping ratio {zeta:.4} vs closed form {ref_hz:.4} Hz, {ref_zeta:.4} \
             ({:.3} % and {:.3} %; asserted {} % and {} %): {}",
            h.what,
            e_hz * 100.0,
            e_zeta * 100.0,
            h.tol_hz * 100.0,
            h.tol_zeta * 100.0,
            if pass { "pass" } else { "FAIL" }
        );
        ok &= pass;
    }
    Ok(ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cardano_pair_is_a_root_of_the_cubic() {
        // Residual of the cubic at the returned root (complex arithmetic by
        // hand), for the drivetrain's coefficients and a textbook cubic
        // (s + 1)(s^2 + 2 s + 5): pair -1 +- 2i.
        let (re, im) = cubic_complex_pair(3.0, 7.0, 5.0);
        assert!((re + 1.0).abs() < 1e-12 && (im - 2.0).abs() < 1e-12);
        let (jm, jl, k, c, b) = (2e-4f64, 1e-3f64, 1.0f64, 2e-3f64, 1e-2f64);
        let lead = jm * jl;
        let (a2, a1, a0) = (
            (jm * (c + b) + jl * c) / lead,
            (k * (jm + jl) + c * b) / lead,
            k * b / lead,
        );
        let (re, im) = cubic_complex_pair(a2, a1, a0);
        // s^2 = (re^2 - im^2) + 2 re im i; s^3 = s^2 * s.
        let (s2r, s2i) = (re * re - im * im, 2.0 * re * im);
        let (s3r, s3i) = (s2r * re - s2i * im, s2r * im + s2i * re);
        let (rr, ri) = (s3r + a2 * s2r + a1 * re + a0, s3i + a2 * s2i + a1 * im);
        assert!(rr.hypot(ri) < 1e-9 * a0, "residual {rr} {ri}");
        // Undamped two-inertia check: with c = b = 0 the shaft mode is
        // sqrt(k (Jm + Jl) / (Jm Jl)) (textbook closed form).
        let (re0, im0) = cubic_complex_pair(0.0, k * (jm + jl) / lead, 1e-30);
        let w0 = (k * (jm + jl) / lead).sqrt();
        assert!(re0.abs() < 1e-6 * w0 && (im0 - w0).abs() < 1e-6 * w0);
    }
}
