//! The integrators on textbook systems with closed-form answers:
//! * harmonic oscillator H = (p^2 + q^2) / 2, exact solution
//!   q(t) = q0 cos t + p0 sin t (any mechanics textbook): convergence order
//!   of each method by step halving, and bounded energy error without secular
//!   drift for the symplectic ones (Hairer, Lubich & Wanner, Geometric
//!   Numerical Integration, 2nd ed., 2006, ch. IX);
//! * pendulum H = p^2/2 + (1 - cos q) (L = g = 1): period
//!   T = 4 sqrt(L/g) K(sin(a/2)) (Abramowitz & Stegun 17.3, with K from the
//!   arithmetic-geometric mean, A&S 17.6);
//! * Kepler problem H = |p|^2/2 - 1/|q|: Stormer-Verlet conserves the angular
//!   momentum q x p exactly, a quadratic invariant (Hairer, Lubich & Wanner,
//!   ch. IV and VI), so in f32 it may change only by round-off.

use visviva_runtime::{Hamiltonian, Integrator, Method, State, StepError};

fn sci(v: &[f64]) -> String {
    v.iter()
        .map(|x| format!("{x:.2e}"))
        .collect::<Vec<_>>()
        .join(" ")
}

struct Oscillator;
struct Pendulum;
struct Kepler;

impl Hamiltonian<2> for Oscillator {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        Ok(0.5 * (x.p[0] * x.p[0] + x.q[0] * x.q[0]))
    }
    fn gradient(
        &self,
        x: &State<2>,
        gq: &mut [f32; 2],
        gp: &mut [f32; 2],
    ) -> Result<(), StepError> {
        gq[0] = x.q[0];
        gp[0] = x.p[0];
        Ok(())
    }
    fn potential_gradient(&self, q: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        out[0] = q[0];
        Ok(())
    }
    fn kinetic_gradient(&self, p: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        out[0] = p[0];
        Ok(())
    }
}

impl Hamiltonian<2> for Pendulum {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        Ok(0.5 * x.p[0] * x.p[0] + (1.0 - x.q[0].cos()))
    }
    fn gradient(
        &self,
        x: &State<2>,
        gq: &mut [f32; 2],
        gp: &mut [f32; 2],
    ) -> Result<(), StepError> {
        gq[0] = x.q[0].sin();
        gp[0] = x.p[0];
        Ok(())
    }
    fn potential_gradient(&self, q: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        out[0] = q[0].sin();
        Ok(())
    }
    fn kinetic_gradient(&self, p: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        out[0] = p[0];
        Ok(())
    }
}

impl Hamiltonian<2> for Kepler {
    fn dof(&self) -> usize {
        2
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        let r = (x.q[0] * x.q[0] + x.q[1] * x.q[1]).sqrt();
        Ok(0.5 * (x.p[0] * x.p[0] + x.p[1] * x.p[1]) - 1.0 / r)
    }
    fn gradient(
        &self,
        x: &State<2>,
        gq: &mut [f32; 2],
        gp: &mut [f32; 2],
    ) -> Result<(), StepError> {
        self.potential_gradient(&x.q, gq)?;
        self.kinetic_gradient(&x.p, gp)
    }
    fn potential_gradient(&self, q: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        let r2 = q[0] * q[0] + q[1] * q[1];
        let r3 = r2 * r2.sqrt();
        out[0] = q[0] / r3;
        out[1] = q[1] / r3;
        Ok(())
    }
    fn kinetic_gradient(&self, p: &[f32; 2], out: &mut [f32; 2]) -> Result<(), StepError> {
        out[0] = p[0];
        out[1] = p[1];
        Ok(())
    }
}

/// A general (non-separable) view of the oscillator, for implicit midpoint
/// and RK4 through the generic path.
struct GeneralOscillator;
impl Hamiltonian<2> for GeneralOscillator {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        false
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        Oscillator.energy(x)
    }
    fn gradient(
        &self,
        x: &State<2>,
        gq: &mut [f32; 2],
        gp: &mut [f32; 2],
    ) -> Result<(), StepError> {
        Oscillator.gradient(x, gq, gp)
    }
}

fn integrator(method: Method, dt: f32) -> Integrator {
    Integrator {
        tolerance: 1e-7,
        max_iterations: 100,
        ..Integrator::new(method, dt)
    }
}

/// Global error at t = 2 of the oscillator from (1, 0) with step `dt`.
fn oscillator_error<H: Hamiltonian<2>>(h: &H, method: Method, dt: f32) -> f64 {
    let steps = (2.0 / dt).round() as usize;
    let it = integrator(method, dt);
    let mut x = State::<2>::new(&[1.0], &[0.0]).unwrap();
    for _ in 0..steps {
        it.step(h, &mut x).unwrap();
    }
    let t = steps as f64 * dt as f64;
    let (q, p) = (t.cos(), -t.sin());
    ((x.q[0] as f64 - q).powi(2) + (x.p[0] as f64 - p).powi(2)).sqrt()
}

fn observed_order<H: Hamiltonian<2>>(h: &H, method: Method, dts: [f32; 3]) -> [f64; 2] {
    let e: Vec<f64> = dts
        .iter()
        .map(|dt| oscillator_error(h, method, *dt))
        .collect();
    println!("{method:?}: errors {}", sci(&e));
    [(e[0] / e[1]).log2(), (e[1] / e[2]).log2()]
}

#[test]
fn convergence_orders_by_step_halving() {
    // Steps chosen so the error stays well above f32 round-off.
    let cases = [
        (
            Method::StormerVerlet,
            observed_order(&Oscillator, Method::StormerVerlet, [0.1, 0.05, 0.025]),
            2.0,
        ),
        (
            Method::Yoshida4,
            observed_order(&Oscillator, Method::Yoshida4, [0.4, 0.2, 0.1]),
            4.0,
        ),
        (
            Method::ImplicitMidpoint,
            observed_order(
                &GeneralOscillator,
                Method::ImplicitMidpoint,
                [0.1, 0.05, 0.025],
            ),
            2.0,
        ),
        (
            Method::Rk4,
            observed_order(&GeneralOscillator, Method::Rk4, [0.4, 0.2, 0.1]),
            4.0,
        ),
    ];
    for (method, orders, expected) in cases {
        println!("{method:?}: observed orders {orders:.3?}, expected {expected}");
        for o in orders {
            assert!(
                (o - expected).abs() < 0.15,
                "{method:?} order {o} != {expected}"
            );
        }
    }
}

/// Max relative energy error over each tenth of a long run.
fn energy_error_profile<H: Hamiltonian<2>>(
    h: &H,
    method: Method,
    dt: f32,
    steps: usize,
    x0: State<2>,
) -> Vec<f64> {
    let it = integrator(method, dt);
    let mut x = x0;
    let e0 = h.energy(&x).unwrap() as f64;
    let mut profile = vec![0.0f64; 10];
    for k in 0..steps {
        it.step(h, &mut x).unwrap();
        let e = h.energy(&x).unwrap() as f64;
        let bin = k * 10 / steps;
        profile[bin] = profile[bin].max(((e - e0) / e0).abs());
    }
    profile
}

#[test]
fn symplectic_energy_error_is_bounded_over_1e5_steps() {
    let x0 = State::<2>::new(&[1.0], &[0.0]).unwrap();
    for (method, dt) in [(Method::StormerVerlet, 0.1f32), (Method::Yoshida4, 0.1)] {
        let prof = energy_error_profile(&Oscillator, method, dt, 100_000, x0);
        println!("{method:?} dt={dt}: energy error per tenth {}", sci(&prof));
        // Kick-drift-kick Verlet on this oscillator conserves exactly
        // H~ = p^2/2 + (1 - dt^2/4) q^2/2 (a modified Hamiltonian; Hairer,
        // Lubich & Wanner, ch. IX), so from (1, 0) the relative error of H is
        // at most dt^2/4 in exact arithmetic. Yoshida-4's is O(dt^4); 1e-4 is
        // ten times the leading term at dt = 0.1 (measured below). Both get
        // 2e-4 for f32 round-off over 1e5 steps (random walk: sqrt(N) * eps
        // times a few operations per step).
        let exact = if method == Method::StormerVerlet {
            (dt * dt / 4.0) as f64
        } else {
            1e-4
        };
        let bound = exact + 2e-4;
        assert!(
            prof.iter().all(|e| *e <= bound),
            "{method:?} exceeds {bound}"
        );
        // No secular drift: from the first tenth to the last, the error may
        // grow only as f32 round-off does, like sqrt(N) * eps (Brouwer's
        // law; Hairer, McLachlan & Razakarivony, BIT 48, 2008), allowed here
        // with a factor 10. A method with drift grows linearly (RK4 below).
        let roundoff = 10.0 * (100_000f64).sqrt() * f32::EPSILON as f64;
        assert!(prof[9] <= prof[0] + roundoff, "{method:?} drifts: {prof:?}");
    }
    // RK4, not symplectic, loses energy steadily (per step a factor
    // |R(ih)|^2 = 1 - h^6/72 + O(h^8) for this oscillator, from its
    // stability function): the
    // contrast the symplectic methods are chosen for.
    let prof = energy_error_profile(&GeneralOscillator, Method::Rk4, 0.2, 20_000, x0);
    println!("Rk4 dt=0.2: energy error per tenth {}", sci(&prof));
    assert!(
        prof[9] > 5.0 * prof[0],
        "RK4 was expected to drift: {prof:?}"
    );
}

/// Complete elliptic integral of the first kind K(k) by the
/// arithmetic-geometric mean: K = pi / (2 AGM(1, sqrt(1 - k^2))) (A&S 17.6).
fn elliptic_k(k: f64) -> f64 {
    let (mut a, mut b) = (1.0f64, (1.0 - k * k).sqrt());
    for _ in 0..30 {
        let (an, bn) = (0.5 * (a + b), (a * b).sqrt());
        a = an;
        b = bn;
    }
    std::f64::consts::PI / (2.0 * a)
}

/// Period of the pendulum released from rest at `amp`, from two sign
/// changes of p (half periods), interpolated linearly.
fn pendulum_period(method: Method, amp: f32, dt: f32) -> f64 {
    let it = integrator(method, dt);
    let mut x = State::<2>::new(&[amp], &[0.0]).unwrap();
    let mut crossings = Vec::new();
    let mut k = 0usize;
    while crossings.len() < 3 && k < 10_000_000 {
        let prev = x.p[0];
        it.step(&Pendulum, &mut x).unwrap();
        k += 1;
        let now = x.p[0];
        if k > 1 && (prev < 0.0) != (now < 0.0) && prev != 0.0 {
            let frac = prev as f64 / (prev as f64 - now as f64);
            crossings.push((k as f64 - 1.0 + frac) * dt as f64);
        }
    }
    // Crossings at T/2, T, 3T/2 (the start is a turning point at p = 0).
    crossings[2] - crossings[0]
}

#[test]
fn pendulum_period_matches_elliptic_integral() {
    for deg in [30.0f64, 60.0, 90.0, 120.0] {
        let a = deg.to_radians();
        let exact = 4.0 * elliptic_k((a / 2.0).sin());
        for (method, dt) in [(Method::Yoshida4, 0.01f32), (Method::StormerVerlet, 0.001)] {
            let t = pendulum_period(method, a as f32, dt);
            let rel = (t - exact).abs() / exact;
            println!("{deg} deg {method:?}: period {t:.6} vs 4K = {exact:.6}, rel {rel:.1e}");
            assert!(rel < 1e-4, "{deg} deg {method:?}: rel error {rel}");
        }
    }
}

#[test]
fn verlet_conserves_kepler_angular_momentum_to_round_off() {
    // Eccentricity 0.5 orbit from pericentre: q = (1 - e, 0), p = (0, sqrt((1+e)/(1-e))).
    let e = 0.5f32;
    let x0 = State::<2>::new(&[1.0 - e, 0.0], &[0.0, ((1.0 + e) / (1.0 - e)).sqrt()]).unwrap();
    let ang = |x: &State<2>| (x.q[0] as f64) * (x.p[1] as f64) - (x.q[1] as f64) * (x.p[0] as f64);
    let l0 = ang(&x0);
    let run = |method: Method| {
        let it = integrator(method, 0.05);
        let mut x = x0;
        let mut worst = 0.0f64;
        for _ in 0..20_000 {
            it.step(&Kepler, &mut x).unwrap();
            worst = worst.max((ang(&x) - l0).abs() / l0);
        }
        worst
    };
    let verlet = run(Method::StormerVerlet);
    let rk4 = run(Method::Rk4);
    println!("angular momentum drift over 20000 steps: Verlet {verlet:.2e}, RK4 {rk4:.2e}");
    // 20000 steps of f32 round-off (eps = 6e-8) in a random walk: ~1e-5.
    assert!(verlet < 2e-5, "Verlet angular momentum changed by {verlet}");
    // RK4 preserves no quadratic invariant: its truncation error shows.
    assert!(rk4 > 10.0 * verlet, "RK4 {rk4} vs Verlet {verlet}");
}
