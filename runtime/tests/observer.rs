//! The extended Kalman filter checked against outside references:
//! * a linear system (harmonic oscillator with an exactly quadratic energy,
//!   implemented through the public `Tangent` trait because no tanh or
//!   softplus network is exactly quadratic): the steady-state covariance
//!   equals the discrete algebraic Riccati equation's solution, computed
//!   here in f64 by iterating the Riccati recursion P- = F P+ F^T + Q,
//!   P+ = P- - P- H^T (H P- H^T + R)^-1 H P- to its fixed point (Simon,
//!   *Optimal State Estimation*, 2006: the discrete-time Kalman filter and
//!   its steady state; chapter numbers from memory, so not cited);
//! * filter consistency (Bar-Shalom, Li and Kirubarajan, *Estimation with
//!   Applications to Tracking and Navigation*, 2001, ch. 5.4): with
//!   simulated measurements of known noise the time-averaged NIS lies in
//!   the two-sided 95 % chi-square interval;
//! * the covariance stays symmetric positive definite over 10^6 steps of a
//!   learned-model blob with missed samples.

mod common;

use common::*;
use visviva_blob_support::OwnedLayer;
use visviva_runtime::format::Activation;
use visviva_runtime::linalg::is_positive_definite;
use visviva_runtime::observer::Update;
use visviva_runtime::{
    Channel, Hamiltonian, Integrator, Measurement, Method, Model, Observer, State, StepError,
    Tangent,
};

/// H = p^2 / (2 m) + k q^2 / 2, one degree of freedom.
struct Oscillator {
    m: f32,
    k: f32,
}

impl Hamiltonian<1> for Oscillator {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<1>) -> Result<f32, StepError> {
        Ok(0.5 * x.p[0] * x.p[0] / self.m + 0.5 * self.k * x.q[0] * x.q[0])
    }
    fn gradient(
        &self,
        x: &State<1>,
        gq: &mut [f32; 1],
        gp: &mut [f32; 1],
    ) -> Result<(), StepError> {
        gq[0] = self.k * x.q[0];
        gp[0] = x.p[0] / self.m;
        Ok(())
    }
    fn potential_gradient(&self, q: &[f32; 1], out: &mut [f32; 1]) -> Result<(), StepError> {
        out[0] = self.k * q[0];
        Ok(())
    }
    fn kinetic_gradient(&self, p: &[f32; 1], out: &mut [f32; 1]) -> Result<(), StepError> {
        out[0] = p[0] / self.m;
        Ok(())
    }
}

impl Tangent<1> for Oscillator {
    fn hessian_vector(
        &self,
        _x: &State<1>,
        dq: &[f32; 1],
        dp: &[f32; 1],
        oq: &mut [f32; 1],
        op: &mut [f32; 1],
    ) -> Result<(), StepError> {
        oq[0] = self.k * dq[0];
        op[0] = dp[0] / self.m;
        Ok(())
    }
}

type M2 = [[f64; 2]; 2];

fn mul(a: &M2, b: &M2) -> M2 {
    let mut c = [[0.0; 2]; 2];
    for i in 0..2 {
        for j in 0..2 {
            c[i][j] = a[i][0] * b[0][j] + a[i][1] * b[1][j];
        }
    }
    c
}

fn transpose(a: &M2) -> M2 {
    [[a[0][0], a[1][0]], [a[0][1], a[1][1]]]
}

/// Stormer-Verlet on the oscillator is linear: q1 = (1 - h^2 w^2 / 2) q + h p / m,
/// p1 = p_half - h k q1 / 2 with p_half = p - h k q / 2 (written out in f64).
fn verlet_matrix(m: f64, k: f64, h: f64) -> M2 {
    let a = 1.0 - h * h * k / (2.0 * m);
    let b = h / m;
    // p1 = p - h k q / 2 - h k (a q + b p) / 2
    [
        [a, b],
        [-h * k / 2.0 - h * k * a / 2.0, 1.0 - h * k * b / 2.0],
    ]
}

#[test]
fn steady_state_covariance_solves_the_riccati_equation() {
    let (m, k, h) = (0.8f32, 2.5f32, 0.05f32);
    let (qq, qp, r) = (1e-6f32, 4e-6f32, 1e-3f32);
    let osc = Oscillator { m, k };
    let it = Integrator::new(Method::StormerVerlet, h);
    let x0 = State::<1>::new(&[0.3], &[0.0]).unwrap();
    let mut obs: Observer<'_, Oscillator, 1, 2> =
        Observer::new(&osc, it, x0, &[1.0, 1.0], &[qq, qp]).unwrap();
    // The filter's own Jacobian against the written-out Verlet matrix.
    let f = verlet_matrix(m as f64, k as f64, h as f64);
    let mut prior = [[0.0f32; 2]; 2];
    let mut innov = [0.0f32; 1];
    for step in 0..4000 {
        obs.predict(&[]).unwrap();
        prior = *obs.covariance();
        let z = 0.3 * (step as f32 * 0.01).cos();
        let meas = [Measurement {
            channel: Channel::Position(0),
            value: z,
            variance: r,
        }];
        obs.update(&meas, &mut innov).unwrap();
    }
    let jac = obs.jacobian();
    for i in 0..2 {
        for j in 0..2 {
            assert!((jac[i][j] as f64 - f[i][j]).abs() < 1e-6, "Jacobian {i}{j}");
        }
    }
    // Riccati recursion in f64 to its fixed point (Simon 2006).
    let qm: M2 = [[qq as f64, 0.0], [0.0, qp as f64]];
    let mut p: M2 = [[1.0, 0.0], [0.0, 1.0]];
    let mut pminus = p;
    for _ in 0..200_000 {
        let fp = mul(&mul(&f, &p), &transpose(&f));
        pminus = [
            [fp[0][0] + qm[0][0], fp[0][1]],
            [fp[1][0], fp[1][1] + qm[1][1]],
        ];
        let s = pminus[0][0] + r as f64;
        let kg = [pminus[0][0] / s, pminus[1][0] / s];
        let next: M2 = [
            [
                pminus[0][0] - kg[0] * pminus[0][0],
                pminus[0][1] - kg[0] * pminus[0][1],
            ],
            [
                pminus[1][0] - kg[1] * pminus[0][0],
                pminus[1][1] - kg[1] * pminus[0][1],
            ],
        ];
        let change = (0..4)
            .map(|e| (next[e / 2][e % 2] - p[e / 2][e % 2]).abs())
            .fold(0.0, f64::max);
        p = next;
        if change < 1e-18 {
            break;
        }
    }
    // The DARE residual of the f64 solution itself is checked too.
    let post = obs.covariance();
    let mut worst = 0.0f64;
    for i in 0..2 {
        for j in 0..2 {
            let rel_prior = (prior[i][j] as f64 - pminus[i][j]).abs()
                / pminus[i][i].abs().max(pminus[j][j].abs());
            let rel_post = (post[i][j] as f64 - p[i][j]).abs() / p[i][i].abs().max(p[j][j].abs());
            worst = worst.max(rel_prior).max(rel_post);
        }
    }
    println!("steady state: prior {prior:?} vs DARE {pminus:?}; max rel. diff {worst:.2e}");
    // f32 covariance arithmetic settled at the Riccati fixed point:
    // measured 1.1e-6 relative; the limit is 10x that.
    assert!(
        worst < 1e-5,
        "steady state differs from the DARE solution by {worst:e}"
    );
}

/// Energy-scaled process noise: one prediction from a known covariance
/// must give F P F^T + Q(x) with F the written-out Verlet matrix and
/// Q_i = Q0_i + Q1_i max(H(x) - H_ref, 0), H the oscillator's closed-form
/// energy p^2 / (2 m) + k q^2 / 2 at the state the step starts from; below
/// the reference the constant part alone. Bad settings are refused and
/// change nothing.
#[test]
fn energy_scaled_process_noise_follows_the_closed_form_energy() {
    let (m, k, h) = (0.8f32, 2.5f32, 0.05f32);
    let osc = Oscillator { m, k };
    let it = Integrator::new(Method::StormerVerlet, h);
    let (q0, q1, reference) = ([1e-6f32, 4e-6], [2e-4f32, 5e-4], 0.01f32);
    let f = verlet_matrix(m as f64, k as f64, h as f64);
    for (q, p) in [(0.3f32, 0.2f32), (0.01, 0.0)] {
        let x0 = State::<1>::new(&[q], &[p]).unwrap();
        let mut obs: Observer<'_, Oscillator, 1, 2> =
            Observer::new(&osc, it, x0, &[1e-2, 3e-2], &q0).unwrap();
        assert_eq!(
            obs.set_energy_scaled_process(&[1e-4, -1.0], reference),
            Err(visviva_runtime::ObserverError::BadNoise { index: 1 })
        );
        assert_eq!(
            obs.set_energy_scaled_process(&q1, f32::NAN),
            Err(visviva_runtime::ObserverError::BadEnergy)
        );
        obs.set_energy_scaled_process(&q1, reference).unwrap();
        obs.predict(&[]).unwrap();
        let (qd, pd) = (q as f64, p as f64);
        let energy = pd * pd / (2.0 * m as f64) + k as f64 * qd * qd / 2.0;
        let excess = (energy - reference as f64).max(0.0);
        let p0: M2 = [[1e-2, 0.0], [0.0, 3e-2]];
        let mut want = mul(&mul(&f, &p0), &transpose(&f));
        for i in 0..2 {
            want[i][i] += q0[i] as f64 + q1[i] as f64 * excess;
        }
        let got = obs.covariance();
        for i in 0..2 {
            for j in 0..2 {
                let rel = (got[i][j] as f64 - want[i][j]).abs() / want[i][i].max(want[j][j]);
                assert!(rel < 1e-6, "P[{i}][{j}] = {} vs {}", got[i][j], want[i][j]);
            }
        }
    }
}

/// A standard normal draw (Box-Muller, common practice).
fn normal(rng: &mut XorShift64Star) -> f64 {
    let u1 = rng.uniform(1e-300, 1.0);
    let u2 = rng.uniform(0.0, 1.0);
    (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
}

/// A two-degree-of-freedom blob with a convex (confining) potential
/// V = sum softplus(+-z_i + 0.3 z_j) (so motion stays bounded for 10^6
/// steps) and a random quadratic kinetic term.
fn confined(rng: &mut XorShift64Star, precision: Precision, method: Method, dt: f32) -> OwnedModel {
    let w1 = [1.0, 0.3, -1.0, -0.3, 0.3, 1.0, -0.3, -1.0];
    let l1 = OwnedLayer::new(2, 4, &w1, &[0.1, -0.1, 0.05, 0.0], precision);
    let l2 = OwnedLayer::new(4, 1, &[1.0, 1.0, 0.8, 0.8], &[0.0], precision);
    let potential = OwnedMlp {
        activation: Activation::Softplus,
        layers: vec![l1, l2],
    };
    let kinetic = random_cholesky(rng, 2);
    random_model(
        2,
        OwnedEnergy::Separable { potential, kinetic },
        Integrator::new(method, dt),
        rng,
    )
}

/// The two-sided 95 % interval of a chi-square variable with `k` degrees of
/// freedom divided by `n`, by the Wilson-Hilferty (1931) cube-root normal
/// approximation (relative error far below 0.1 % at k in the thousands);
/// 1.959964 is the standard normal 0.975 quantile (from memory; the
/// NIST/SEMATECH e-Handbook normal table lists 1.96).
fn chi2_interval_95(k: f64, n: f64) -> (f64, f64) {
    let q = |z: f64| k * (1.0 - 2.0 / (9.0 * k) + z * (2.0 / (9.0 * k)).sqrt()).powi(3);
    (q(-1.959964) / n, q(1.959964) / n)
}

/// One run of `steps` steps: the time-averaged NIS and its 95 % interval.
fn nis_run(seed: u64, precision: Precision, method: Method, steps: usize) -> (f64, f64, f64) {
    let mut rng = XorShift64Star(seed);
    let owned = confined(&mut rng, precision, method, 0.02);
    let blob = owned.blob().unwrap();
    let model: Model<'_, 2, 16> = Model::from_bytes(&blob).unwrap();
    let (qn, r) = ([1e-7f32, 1e-7, 1e-6, 1e-6], [4e-4f32, 1e-4]);
    let mut truth = State::<2>::new(&[0.5, -0.3], &[0.2, 0.1]).unwrap();
    let p0 = [1e-4f32, 1e-4, 1e-4, 1e-4];
    let mut x0 = truth;
    for i in 0..2 {
        x0.q[i] += (1e-2 * normal(&mut rng)) as f32;
        x0.p[i] += (1e-2 * normal(&mut rng)) as f32;
    }
    let mut obs: Observer<'_, _, 2, 4> =
        Observer::new(&model, model.integrator(), x0, &p0, &qn).unwrap();
    let (mut sum, mut count) = (0.0f64, 0u32);
    let mut innov = [0.0f32; 2];
    for _ in 0..steps {
        model.step(&mut truth).unwrap();
        for i in 0..2 {
            truth.q[i] += (qn[i] as f64).sqrt() as f32 * normal(&mut rng) as f32;
            truth.p[i] += (qn[2 + i] as f64).sqrt() as f32 * normal(&mut rng) as f32;
        }
        obs.predict(&[]).unwrap();
        let meas: Vec<Measurement> = (0..2)
            .map(|i| Measurement {
                channel: Channel::Position(i as u8),
                value: truth.q[i] + ((r[i] as f64).sqrt() * normal(&mut rng)) as f32,
                variance: r[i],
            })
            .collect();
        let up: Update = obs.update(&meas, &mut innov).unwrap();
        sum += up.nis as f64;
        count += up.count;
    }
    let (lo, hi) = chi2_interval_95(count as f64, steps as f64);
    (sum / steps as f64, lo, hi)
}

/// Each run's time-averaged NIS falls outside its 95 % interval with
/// probability 0.05 when the filter is consistent, so over 20 independent
/// runs the count outside is Binomial(20, 0.05): P(count >= 5) = 0.016
/// (binomial tail, computed in the test), so at most 4 may fall outside.
#[test]
fn time_averaged_nis_lies_in_the_95_percent_interval() {
    let tail: f64 = (5..=20u32)
        .map(|k| {
            let choose = (1..=k).fold(1.0f64, |a, i| a * (20 - k + i) as f64 / i as f64);
            choose * 0.05f64.powi(k as i32) * 0.95f64.powi(20 - k as i32)
        })
        .sum();
    assert!(tail < 0.02, "binomial tail {tail}");
    for (precision, method) in [
        (Precision::F32, Method::StormerVerlet),
        (Precision::Int8, Method::DiscreteGradient),
    ] {
        let mut outside = 0;
        let mut mean = 0.0;
        for seed in 1..=20u64 {
            let (avg, lo, hi) = nis_run(0x0b5e_1000 + seed, precision, method, 2000);
            mean += avg / 20.0;
            if !(lo <= avg && avg <= hi) {
                outside += 1;
                println!(
                    "{precision:?} {method:?} seed {seed}: NIS {avg:.4} outside [{lo:.4}, {hi:.4}]"
                );
            }
        }
        println!("{precision:?} {method:?}: 20 runs of 2000 steps, mean time-averaged NIS {mean:.4} (2 measurements), {outside} of 20 outside their 95 % interval");
        assert!(
            outside <= 4,
            "{outside} of 20 runs outside the 95 % interval"
        );
    }
}

#[test]
fn covariance_stays_positive_definite_over_a_million_steps() {
    let mut rng = XorShift64Star(0x0b5e_1002);
    let owned = confined(&mut rng, Precision::F32, Method::StormerVerlet, 0.01);
    let blob = owned.blob().unwrap();
    let model: Model<'_, 2, 16> = Model::from_bytes(&blob).unwrap();
    let mut truth = State::<2>::new(&[0.8, -0.5], &[0.0, 0.3]).unwrap();
    let mut obs: Observer<'_, _, 2, 4> = Observer::new(
        &model,
        model.integrator(),
        truth,
        &[1.0; 4],
        &[1e-9, 1e-9, 1e-8, 1e-8],
    )
    .unwrap();
    let mut innov = [0.0f32; 2];
    let (mut worst_asym, mut checks) = (0.0f32, 0);
    for step in 0..1_000_000u32 {
        model.step(&mut truth).unwrap();
        obs.predict(&[]).unwrap();
        // One sample in three is missed; the others measure q1 only or both.
        if step % 3 != 2 {
            let both = step % 3 == 0;
            let meas = [
                Measurement {
                    channel: Channel::Position(0),
                    value: truth.q[0] + 1e-3 * normal(&mut rng) as f32,
                    variance: 1e-6,
                },
                Measurement {
                    channel: Channel::Position(1),
                    value: truth.q[1] + 1e-3 * normal(&mut rng) as f32,
                    variance: 1e-6,
                },
            ];
            obs.update(if both { &meas } else { &meas[..1] }, &mut innov)
                .unwrap();
        }
        if step % 1000 == 999 {
            let p = obs.covariance();
            assert!(
                is_positive_definite(p, 4),
                "not positive definite at step {step}: {p:?}"
            );
            for i in 0..4 {
                for j in 0..4 {
                    worst_asym = worst_asym.max((p[i][j] - p[j][i]).abs());
                }
            }
            checks += 1;
        }
    }
    let p = obs.covariance();
    println!(
        "after 10^6 steps: {checks} positive-definite checks passed, P diag {:?}",
        [p[0][0], p[1][1], p[2][2], p[3][3]]
    );
    assert_eq!(worst_asym, 0.0, "covariance not symmetric");
    let err = (obs.state().q[0] - truth.q[0]).abs();
    assert!(err < 5e-3, "estimate drifted: {err}");
}

/// p = M v inverts v = dH/dp for a quadratic kinetic term (round trip
/// through the runtime's own gradient, a consistency check), and is
/// refused (None) for a network kinetic term.
#[test]
fn momentum_from_velocity_inverts_the_quadratic_kinetic_gradient() {
    let mut rng = XorShift64Star(0x0b5e_3001);
    let owned = separable(
        &mut rng,
        3,
        &[8],
        Activation::Tanh,
        Precision::F32,
        Method::StormerVerlet,
        0.01,
    );
    let blob = owned.blob().unwrap();
    let model: Model<'_, 4, 16> = Model::from_bytes(&blob).unwrap();
    let mut worst = 0.0f32;
    for _ in 0..100 {
        let mut p = [0.0f32; 4];
        for v in p.iter_mut().take(3) {
            *v = rng.uniform(-2.0, 2.0) as f32;
        }
        let mut v = [0.0f32; 4];
        model.kinetic_gradient(&p, &mut v).unwrap();
        let mut back = [0.0f32; 3];
        model.momentum_from_velocity(&v[..3], &mut back).unwrap();
        for i in 0..3 {
            worst = worst.max((back[i] - p[i]).abs() / (1.0 + p[i].abs()));
        }
    }
    println!("p = M v round trip: worst rel. error {worst:.2e}");
    assert!(worst < 1e-5, "round trip error {worst}");
    let potential = OwnedMlp::random(&mut rng, &[2, 4, 1], Activation::Tanh, Precision::F32);
    let kinetic = OwnedKinetic::Network(OwnedMlp::random(
        &mut rng,
        &[2, 4, 1],
        Activation::Tanh,
        Precision::F32,
    ));
    let net = random_model(
        2,
        OwnedEnergy::Separable { potential, kinetic },
        Integrator::new(Method::StormerVerlet, 0.01),
        &mut rng,
    );
    let blob = net.blob().unwrap();
    let model: Model<'_, 4, 16> = Model::from_bytes(&blob).unwrap();
    assert!(model
        .momentum_from_velocity(&[0.1, 0.2], &mut [0.0; 2])
        .is_none());
}
