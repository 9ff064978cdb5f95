//! The report's learned-energy drift (max |H(t) - H(0)| of the blob's own
//! energy over `check`'s long horizon, divided by the blob's energy scale)
//! against closed forms, on the sensor mass on a flexure (mass-spring,
//! H = p^2/(2m) + k q^2/2):
//!
//! * the exact energy written as a blob, stepped by Stormer-Verlet, gets
//!   the integrator's own energy error and nothing more: for the harmonic
//!   oscillator, kick-drift-kick Stormer-Verlet conserves the modified
//!   energy H~ = p^2/(2m) + (k/2)(1 - (h w)^2/4) q^2 exactly, so the energy
//!   error is bounded (no drift) and O(h^2): |H(t) - H(0)| <= H(0)
//!   (h w)^2/4 / (1 - (h w)^2/4) (Hairer, Lubich & Wanner, *Geometric
//!   Numerical Integration*, 2nd ed., Springer 2006: the Stormer-Verlet
//!   method on the harmonic oscillator, chapter I, and bounded energy error
//!   of symplectic methods, chapter IX; section numbers from memory). The
//!   largest error over a long horizon follows from H~ in closed form:
//!   (k h^2 w^2 / 8) max(q~max^2 - q0^2, q0^2) with q~max^2 = 2 H~ /
//!   (k (1 - (h w)^2/4)).
//! * a deliberately wrong model (the same blob plus a rough potential: a few
//!   steep tanh steps, as an overfitted network has) gets a larger learned
//!   drift, and its true drift (the closed-form energy of the mass-spring
//!   along its rollout) is larger too: the figure ranks the two like their
//!   true drift.
//!
//! The exact blob: T = 1/2 l^2 z_p^2 is exactly quadratic; V is the
//! symmetric pair A (tanh(b + w z) + tanh(b - w z) - 2 tanh b), whose Taylor
//! series in x = w z is 2 A (tanh''(b) x^2/2 + tanh''''(b) x^4/24 + ...):
//! with tanh b = sqrt(2/3) the x^4 term vanishes (tanh'''' = 8 t (2 - 3 t^2)
//! (1 - t^2) for t = tanh b), and with w = 0.05 over |z| <= 2.1 the x^6 term
//! and the f32 rounding stay far below the integrator's error. The test
//! measures that modelling error over the whole range and allows exactly it.

use visviva_blob_support::{
    OwnedEnergy, OwnedKinetic, OwnedLayer, OwnedMlp, OwnedModel, Precision,
};
use visviva_runtime::format::Activation;
use visviva_runtime::{Hamiltonian, Integrator, Method, State};
use visviva_trainer::data::dataset::Dataset;
use visviva_trainer::deploy::blob::HostModel;
use visviva_trainer::evidence::check::{check, CheckSettings};
use visviva_trainer::reference::simulate::{simulate, SimulationSpec};
use visviva_trainer::reference::{build_system, ReferenceSystem};

/// Steps per period of the true system (the log's interval, at which
/// `check` steps the model): h w = 2 pi / 100.
const STEPS_PER_PERIOD: f64 = 100.0;

/// The mass-spring's parameters and the blob's normalization.
struct Spring {
    m: f64,
    k: f64,
    amp: f64,
    /// Coordinate and momentum scales (offsets zero) and the energy scale.
    sq: f32,
    sp: f32,
    es: f32,
}

impl Spring {
    fn of(system: &dyn ReferenceSystem) -> Self {
        let (m, k, amp) = (
            system.params().get("m"),
            system.params().get("k"),
            system.params().get("amp"),
        );
        let omega = (k / m).sqrt();
        Self {
            m,
            k,
            amp,
            sq: (amp / 2.0) as f32,
            sp: (m * omega * amp / 2.0) as f32,
            es: (k * amp * amp / 4.0) as f32,
        }
    }

    /// The exact energy as a Stormer-Verlet blob with step `dt`, plus
    /// `rough` extra potential units (weight, bias, output weight) in
    /// normalized units.
    fn blob(&self, dt: f32, rough: &[(f32, f32, f32)]) -> Vec<u8> {
        let t = (2.0f64 / 3.0).sqrt();
        let b = t.atanh();
        let t2 = -2.0 * t * (1.0 - t * t);
        let w = 0.05f64;
        // es A t2 w^2 z^2 = k q^2 / 2 = k sq^2 z^2 / 2.
        let a = self.k * (self.sq as f64).powi(2) / (2.0 * self.es as f64 * t2 * w * w);
        let mut w1 = vec![w as f32, -w as f32];
        let mut b1 = vec![b as f32, b as f32];
        let mut w2 = vec![a as f32, a as f32];
        for &(wr, br, ar) in rough {
            w1.push(wr);
            b1.push(br);
            w2.push(ar);
        }
        let hidden = w1.len();
        let potential = OwnedMlp {
            activation: Activation::Tanh,
            layers: vec![
                OwnedLayer::new(1, hidden, &w1, &b1, Precision::F32),
                OwnedLayer::new(hidden, 1, &w2, &[(-2.0 * a * t) as f32], Precision::F32),
            ],
        };
        // es l^2 z_p^2 / 2 = p^2 / (2 m) with z_p = p / sp.
        let l = (self.sp as f64 / (self.m * self.es as f64).sqrt()) as f32;
        OwnedModel::new(
            1,
            vec![0.0, 0.0],
            vec![self.sq, self.sp],
            self.es,
            OwnedEnergy::Separable {
                potential,
                kinetic: OwnedKinetic::quadratic(vec![l]),
            },
            Integrator::new(Method::StormerVerlet, dt),
        )
        .blob()
        .unwrap()
    }

    /// The closed-form energy.
    fn energy(&self, q: f64, p: f64) -> f64 {
        p * p / (2.0 * self.m) + 0.5 * self.k * q * q
    }
}

/// The largest |H_blob - H| over positions up to `q_max` and momenta up to
/// `p_max` (2001 points each, 5 % beyond).
fn modelling_error(model: &HostModel<'_>, s: &Spring, q_max: f64, p_max: f64) -> f64 {
    (0..=2000)
        .map(|i| -1.05 + 2.1 * i as f64 / 2000.0)
        .flat_map(|f| [(f * q_max, 0.0), (0.0, f * p_max)])
        .map(|(q, p)| {
            let st = State::new(&[q as f32], &[p as f32]).unwrap();
            let e = model.energy(&st).unwrap() as f64;
            (e - s.energy(q as f32 as f64, p as f32 as f64)).abs()
        })
        .fold(0.0, f64::max)
}

/// Learned and true drift of `model` on every trajectory of `val`
/// (`check`'s long horizon), with each trajectory's initial state.
fn drifts(
    model: &HostModel<'_>,
    val: &Dataset,
    system: &dyn ReferenceSystem,
) -> Vec<(f64, f64, f64, f64)> {
    let report = check(model, None, val, Some(system), &CheckSettings::default()).unwrap();
    report
        .trajectories
        .iter()
        .zip(&val.trajectories)
        .map(|(t, v)| {
            (
                t.model.learned_energy_drift.expect("learned drift"),
                t.model.true_energy_drift.expect("true drift"),
                v.x[[0, 0]],
                v.x[[0, 1]],
            )
        })
        .collect()
}

#[test]
fn the_exact_energy_gets_the_integrators_drift_and_a_wrong_model_a_larger_one() {
    let system = build_system("flexure", &[]).unwrap();
    let s = Spring::of(system.as_ref());
    let period = system.small_amplitude_period().expect("closed form");
    let val = simulate(
        system.as_ref(),
        &SimulationSpec {
            trajectories: 4,
            duration: period,
            rate: STEPS_PER_PERIOD / period,
            seed: 5,
        },
    )
    .unwrap();
    let h = val.trajectories[0].t[1] - val.trajectories[0].t[0];
    let hw2 = (h * (s.k / s.m).sqrt()).powi(2);
    let bound = hw2 / 4.0 / (1.0 - hw2 / 4.0);

    let exact_bytes = s.blob(h as f32, &[]);
    let exact = HostModel::from_bytes(&exact_bytes).unwrap();
    let p_amp = (s.m * s.k).sqrt() * s.amp;
    let delta = modelling_error(&exact, &s, s.amp, p_amp);
    let full = s.energy(s.amp, 0.0);
    println!(
        "exact blob: modelling error {delta:.3e} J = {:.2e} of the largest energy; Verlet bound (h w)^2/4 / (1 - (h w)^2/4) = {bound:.4e}",
        delta / full
    );
    assert!(
        delta <= 1e-4 * full,
        "the exact blob is off by {delta:.3e} J"
    );

    // Steep steps of 1 % of the energy scale at z = -0.6, 0.1, 0.8: an
    // energy with the roughness of an overfitted network.
    let rough = [(30.0, 18.0, 0.01), (30.0, -3.0, -0.01), (30.0, -24.0, 0.01)];
    let wrong_bytes = s.blob(h as f32, &rough);
    let wrong = HostModel::from_bytes(&wrong_bytes).unwrap();

    let good = drifts(&exact, &val, system.as_ref());
    let bad = drifts(&wrong, &val, system.as_ref());
    for ((learned, truth, q0, p0), (bad_learned, bad_truth, _, _)) in good.iter().zip(&bad) {
        let h0 = s.energy(*q0, *p0);
        // The closed form of the largest Stormer-Verlet energy error from
        // this state (see the module comment).
        let modified = p0 * p0 / (2.0 * s.m) + 0.5 * s.k * (1.0 - hw2 / 4.0) * q0 * q0;
        let qmax2 = 2.0 * modified / (s.k * (1.0 - hw2 / 4.0));
        let predicted = s.k * hw2 / 8.0 * (qmax2 - q0 * q0).max(q0 * q0);
        let es = s.es as f64;
        // The modelling error over this orbit's own range.
        let delta = modelling_error(&exact, &s, qmax2.sqrt(), (2.0 * s.m * modified).sqrt());
        println!(
            "q0 {q0:.3e} m, p0 {p0:.3e} kg m/s: exact blob learned drift {learned:.4e} energy scales \
             (closed form {:.4e}), true drift {truth:.4e} of H(0) (closed form {:.4e}, bound {bound:.4e}); \
             wrong model learned {bad_learned:.4e}, true {bad_truth:.4e}; modelling error on the orbit {delta:.2e} J",
            predicted / es,
            predicted / h0
        );
        // The exact energy gets the integrator's error: the closed form,
        // within the measured modelling error on each side (2 delta) and
        // 1 % for f32 rounding of the states.
        let allowed = 0.01 * predicted + 2.0 * delta;
        assert!(
            (learned * es - predicted).abs() <= allowed,
            "learned {learned:.4e}"
        );
        assert!(
            (truth * h0 - predicted).abs() <= allowed,
            "true {truth:.4e}"
        );
        assert!(
            *truth <= bound + 2.0 * delta / h0,
            "true drift {truth:.4e} above the bound"
        );
        // The wrong model: a larger learned drift and a larger true drift.
        assert!(
            bad_learned > learned,
            "wrong model's learned drift {bad_learned:.4e} not above {learned:.4e}"
        );
        assert!(
            bad_truth > truth,
            "wrong model's true drift {bad_truth:.4e} not above {truth:.4e}"
        );
    }
}
