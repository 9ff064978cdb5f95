//! The discrete-gradient step where its difference quotient is least
//! resolved in f32:
//! * from every state of the damped/driven demo logs (servo drivetrain,
//!   trolley crane; f32 and int8 blobs) the step converges with the blob's
//!   own settings (before the correction's share was ramped, five states
//!   alternated between the corrected and the midpoint branch forever);
//! * from rest states (reached by letting a damped model settle) and from
//!   states 1e-7 .. 1e-3 away, for conservative and damped/driven blobs, the
//!   step converges;
//! * the energy balance H(x1) - H(x0) = -h gbar^T R gbar + h gbar^T G u,
//!   the discrete gradient's defining property (Gonzalez, J. Nonlinear
//!   Sci. 6, 1996; McLachlan, Quispel & Robidoux, Phil. Trans. R. Soc. A
//!   357, 1999), holds to f32 round-off, with gbar recovered in f64 from the
//!   step itself (d / h = (J - R) gbar + G u, J - R invertible for R >= 0);
//! * the method keeps order 2 on a damped oscillator against its closed-form
//!   solution (any vibration textbook, e.g. Thomson, Theory of Vibration
//!   with Applications, ch. 2 — from memory).

mod common;

use std::path::PathBuf;

use common::*;
use visviva_runtime::format::Activation;
use visviva_runtime::{Hamiltonian, Integrator, Method, Model, State, StepError};

fn demos() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../models-demo")
}

/// (q, p, u) of every row of a canonical log (columns named q1.., p1..,
/// u1..).
fn log_states(path: &PathBuf, n: usize, m: usize) -> Vec<(Vec<f32>, Vec<f32>, Vec<f32>)> {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: String| header.iter().position(|h| *h == name).unwrap();
    let (qc, pc, uc): (Vec<usize>, Vec<usize>, Vec<usize>) = (
        (1..=n).map(|i| col(format!("q{i}"))).collect(),
        (1..=n).map(|i| col(format!("p{i}"))).collect(),
        (1..=m).map(|i| col(format!("u{i}"))).collect(),
    );
    lines
        .map(|l| {
            let v: Vec<f32> = l.split(',').map(|s| s.parse().unwrap()).collect();
            let pick = |c: &[usize]| c.iter().map(|&i| v[i]).collect::<Vec<f32>>();
            (pick(&qc), pick(&pc), pick(&uc))
        })
        .collect()
}

const DAMPED_DEMOS: [(&str, &str); 4] = [
    ("servo-drivetrain", "servo-f32-dgrad"),
    ("servo-drivetrain", "servo-int8-dgrad"),
    ("trolley-crane", "trolley-f32-dgrad"),
    ("trolley-crane", "trolley-int8-dgrad"),
];

#[test]
fn every_logged_state_of_the_damped_demos_steps() {
    for (demo, blob) in DAMPED_DEMOS {
        let bytes =
            std::fs::read(demos().join(demo).join("out").join(format!("{blob}.vvb"))).unwrap();
        let model: Model<'_, 4, 64> = Model::from_bytes(&bytes).unwrap();
        assert_eq!(model.integrator().method, Method::DiscreteGradient);
        let (n, m) = (model.dof(), model.inputs());
        for log in ["train.csv", "val.csv"] {
            let states = log_states(&demos().join(demo).join("data").join(log), n, m);
            let mut failed = Vec::new();
            for (q, p, u) in &states {
                let mut x = State::<4>::new(q, p).unwrap();
                if let Err(e) = model.step_driven(&mut x, u) {
                    failed.push((q.clone(), p.clone(), e));
                }
            }
            println!(
                "{blob} on {demo}/{log}: {} states, {} steps failed",
                states.len(),
                failed.len()
            );
            assert!(failed.is_empty(), "{blob} on {log}: {failed:?}");
        }
    }
}

/// A state settled by `damped` (same energy as the model it is used with)
/// from `x`, with no input: at most 200,000 steps, until a step moves no
/// coordinate by more than 1e-7 of its own size plus 1e-9 (or a step
/// fails).
fn settle<H: Hamiltonian<4>>(damped: &H, it: &Integrator, mut x: State<4>) -> State<4> {
    let zeros = vec![0.0f32; damped.inputs()];
    for _ in 0..200_000 {
        let before = x;
        if it.step_driven(damped, &mut x, &zeros).is_err() {
            break; // the last state reached is as near rest as it gets
        }
        let n = x.dof();
        let still = (0..n).all(|i| {
            (x.q[i] - before.q[i]).abs() <= 1e-7 * x.q[i].abs() + 1e-9
                && (x.p[i] - before.p[i]).abs() <= 1e-7 * x.p[i].abs() + 1e-9
        });
        if still {
            break;
        }
    }
    x
}

/// Rest state `x` and states `offset` away along a fixed direction (scaled
/// by the coordinate's size plus one), each stepped by `model` with no input
/// and with input `u`; returns the failures.
fn step_around(model: &Model<'_, 4, 64>, x: &State<4>, u: &[f32]) -> Vec<(f32, StepError)> {
    let zeros = vec![0.0f32; model.inputs()];
    let n = x.dof();
    let mut failed = Vec::new();
    for offset in [0.0f32, 1e-7, 1e-6, 1e-5, 1e-4, 1e-3] {
        let mut y = *x;
        for i in 0..n {
            y.q[i] += offset * (1.0 + y.q[i].abs()) * if i % 2 == 0 { 1.0 } else { -0.7 };
            y.p[i] -= offset * (1.0 + y.p[i].abs()) * if i % 2 == 0 { 0.4 } else { -1.0 };
        }
        for input in [&zeros[..], u] {
            let mut z = y;
            if let Err(e) = model.step_driven(&mut z, input) {
                failed.push((offset, e));
            }
        }
    }
    failed
}

#[test]
fn rest_and_near_rest_states_step_for_fixture_blobs() {
    let mut rng = XorShift64Star(0x5e771e);
    let mut checked = 0;
    for (k, act) in [Activation::Tanh, Activation::Softplus]
        .into_iter()
        .enumerate()
    {
        for precision in [Precision::F32, Precision::Int8] {
            let base = separable(
                &mut rng,
                1 + k,
                &[16, 16],
                act,
                precision,
                Method::DiscreteGradient,
                0.02,
            );
            let general_base = general(
                &mut rng,
                2 - k,
                &[16],
                act,
                precision,
                Method::DiscreteGradient,
                0.05,
            );
            for conservative in [base, general_base] {
                let damped = conservative.clone().with_port(&mut rng, 0.5, 1);
                let networks =
                    conservative
                        .clone()
                        .with_port_networks(&mut rng, 0.5, 1, 8, Precision::F32);
                let blobs = [
                    conservative.blob().unwrap(),
                    damped.blob().unwrap(),
                    networks.blob().unwrap(),
                ];
                let models: Vec<Model<'_, 4, 64>> = blobs
                    .iter()
                    .map(|b| Model::from_bytes(b).unwrap())
                    .collect();
                let n = models[0].dof();
                let start = State::<4>::new(&vec![0.3; n], &vec![-0.2; n]).unwrap();
                // The rest state of the energy: where the damped model settles.
                let settle_it = Integrator {
                    max_iterations: 200,
                    ..models[1].integrator()
                };
                let rest = settle(&models[1], &settle_it, start);
                for model in &models {
                    let u = vec![0.05f32; model.inputs()];
                    for x in [rest, State::<4>::zeros(n).unwrap()] {
                        let failed = step_around(model, &x, &u);
                        assert!(
                            failed.is_empty(),
                            "{act:?} {precision:?} at {x:?}: {failed:?}"
                        );
                        checked += 1;
                    }
                }
            }
        }
    }
    println!("{checked} rest states (with 6 offsets and 2 inputs each) stepped");
}

#[test]
fn rest_and_near_rest_states_step_for_the_damped_demos() {
    for (demo, blob) in DAMPED_DEMOS {
        let bytes =
            std::fs::read(demos().join(demo).join("out").join(format!("{blob}.vvb"))).unwrap();
        let model: Model<'_, 4, 64> = Model::from_bytes(&bytes).unwrap();
        let (n, m) = (model.dof(), model.inputs());
        let first = &log_states(&demos().join(demo).join("data/val.csv"), n, m)[0];
        let start = State::<4>::new(&first.0, &first.1).unwrap();
        let rest = settle(&model, &model.integrator(), start);
        let u = first.2.clone();
        for x in [rest, State::<4>::zeros(n).unwrap()] {
            let failed = step_around(&model, &x, &u);
            println!(
                "{blob}: rest state q {:?} p {:?}: {} failed",
                &x.q[..n],
                &x.p[..n],
                failed.len()
            );
            assert!(failed.is_empty(), "{blob} at {x:?}: {failed:?}");
        }
    }
}

/// Solve a (k x k, row-major) x = b by Gaussian elimination with partial
/// pivoting in f64.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let k = b.len();
    for c in 0..k {
        let piv = (c..k)
            .max_by(|&i, &j| a[i][c].abs().total_cmp(&a[j][c].abs()))
            .unwrap();
        a.swap(c, piv);
        b.swap(c, piv);
        for r in c + 1..k {
            let f = a[r][c] / a[c][c];
            for j in c..k {
                a[r][j] -= f * a[c][j];
            }
            b[r] -= f * b[c];
        }
    }
    let mut x = vec![0.0; k];
    for r in (0..k).rev() {
        let s: f64 = (r + 1..k).map(|j| a[r][j] * x[j]).sum();
        x[r] = (b[r] - s) / a[r][r];
    }
    x
}

/// The field's parts at coordinates `q`, read off the model as columns:
/// B = J - R(q) (unit gradients, no input) and G(q) u (zero gradient).
fn field_parts(model: &Model<'_, 4, 64>, q: &[f32; 4], u: &[f32]) -> (Vec<Vec<f64>>, Vec<f64>) {
    let n = model.dof();
    let zeros = vec![0.0f32; model.inputs()];
    let mut b = vec![vec![0.0f64; 2 * n]; 2 * n];
    let col = |gq: &[f32; 4], gp: &[f32; 4], u: &[f32]| {
        let (mut fq, mut fp) = ([0.0f32; 4], [0.0f32; 4]);
        model.field_from_gradient(q, gq, gp, u, &mut fq, &mut fp);
        (0..2 * n)
            .map(|i| if i < n { fq[i] } else { fp[i - n] } as f64)
            .collect::<Vec<f64>>()
    };
    for c in 0..2 * n {
        let (mut gq, mut gp) = ([0.0f32; 4], [0.0f32; 4]);
        if c < n {
            gq[c] = 1.0;
        } else {
            gp[c - n] = 1.0;
        }
        let f = col(&gq, &gp, &zeros);
        for (r, v) in f.into_iter().enumerate() {
            b[r][c] = v;
        }
    }
    let gu = col(&[0.0; 4], &[0.0; 4], u);
    (b, gu)
}

#[test]
fn energy_balance_holds_to_round_off() {
    let mut rng = XorShift64Star(0xba1a5ce);
    let mut blobs = Vec::new();
    for act in [Activation::Tanh, Activation::Softplus] {
        for precision in [Precision::F32, Precision::Int8] {
            let s = separable(
                &mut rng,
                2,
                &[16],
                act,
                precision,
                Method::DiscreteGradient,
                0.02,
            );
            blobs.push(s.with_port(&mut rng, 0.4, 1).blob().unwrap());
            let g = general(
                &mut rng,
                1,
                &[16, 16],
                act,
                precision,
                Method::DiscreteGradient,
                0.02,
            );
            blobs.push(g.with_port(&mut rng, 0.4, 2).blob().unwrap());
            let s = separable(
                &mut rng,
                2,
                &[16],
                act,
                precision,
                Method::DiscreteGradient,
                0.02,
            );
            blobs.push(
                s.with_port_networks(&mut rng, 0.5, 1, 8, precision)
                    .blob()
                    .unwrap(),
            );
        }
    }
    let (mut steps, mut worst) = (0u32, 0.0f64);
    for k in 0..6000usize {
        let model: Model<'_, 4, 64> = Model::from_bytes(&blobs[k % blobs.len()]).unwrap();
        let (n, m) = (model.dof(), model.inputs());
        let q: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
        let p: Vec<f32> = (0..n).map(|_| rng.uniform(-1.5, 1.5) as f32).collect();
        let u: Vec<f32> = (0..m).map(|_| rng.uniform(-1.0, 1.0) as f32).collect();
        // Near rest too: one state in four is scaled down 1e3 times.
        let shrink = if k % 4 == 0 { 1e-3 } else { 1.0 };
        let q: Vec<f32> = q.iter().map(|v| v * shrink).collect();
        let p: Vec<f32> = p.iter().map(|v| v * shrink).collect();
        let x0 = State::<4>::new(&q, &p).unwrap();
        let mut x1 = x0;
        if model.step_driven(&mut x1, &u).is_err() {
            continue;
        }
        steps += 1;
        let h = model.integrator().dt as f64;
        let mut qm = [0.0f32; 4];
        for i in 0..n {
            qm[i] = 0.5 * (x0.q[i] + x1.q[i]);
        }
        let (b, gu) = field_parts(&model, &qm, &u);
        let flat = |x: &State<4>| {
            (0..2 * n)
                .map(|i| if i < n { x.q[i] } else { x.p[i - n] } as f64)
                .collect::<Vec<f64>>()
        };
        let (a0, a1) = (flat(&x0), flat(&x1));
        let d: Vec<f64> = (0..2 * n).map(|i| a1[i] - a0[i]).collect();
        let rhs: Vec<f64> = (0..2 * n).map(|i| d[i] / h - gu[i]).collect();
        let gbar = solve(b.clone(), rhs);
        // -gbar^T R gbar = gbar^T B gbar (J is skew); + gbar^T G u.
        let mut balance = 0.0;
        for i in 0..2 * n {
            balance += gbar[i] * gu[i];
            for j in 0..2 * n {
                balance += gbar[i] * b[i][j] * gbar[j];
            }
        }
        balance *= h;
        let (e0, e1) = (
            model.energy(&x0).unwrap() as f64,
            model.energy(&x1).unwrap() as f64,
        );
        // f32 round-off: the step drops the correction below its level
        // 8 eps (|H0| + |H1| + 2 E_t + 2 sum |m_i g_i|) and ramps it in up to
        // twice that (an energy error of at most 16 of the units below); the
        // energies carry a few eps of their term size; gbar recovered from
        // the rounded x1 adds about eps sum |x_i| |gbar_i|. Bound: 32 units
        // of eps (|H0| + |H1| + 2 E_t + sum (|x0_i| + |x1_i|) |gbar_i|).
        let ulp = f32::EPSILON as f64;
        let sensitivity: f64 = (0..2 * n)
            .map(|i| (a0[i].abs() + a1[i].abs()) * gbar[i].abs())
            .sum();
        let terms = 2.0 * model.energy_term_size() as f64;
        let scale = ulp * (e0.abs() + e1.abs() + terms + sensitivity);
        let err = (e1 - e0 - balance).abs() / scale;
        worst = worst.max(err);
        assert!(
            err < 32.0,
            "state {k}: H1 - H0 = {} vs balance {balance} ({err} round-off units)",
            e1 - e0
        );
    }
    // Measured: at most 8.4 units.
    println!("{steps} steps: energy balance error at most {worst:.2} round-off units");
    assert!(steps > 5_700, "only {steps} of 6000 steps converged");
}

/// m q'' + c q' + k q = 0 as a port-Hamiltonian system.
struct Damped {
    c: f32,
}

impl Hamiltonian<2> for Damped {
    fn dof(&self) -> usize {
        1
    }
    fn is_separable(&self) -> bool {
        true
    }
    fn energy(&self, x: &State<2>) -> Result<f32, StepError> {
        Ok(0.5 * x.p[0] * x.p[0] + 0.5 * x.q[0] * x.q[0])
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
    fn has_port_terms(&self) -> bool {
        true
    }
    fn field_from_gradient(
        &self,
        _q: &[f32; 2],
        gq: &[f32; 2],
        gp: &[f32; 2],
        _u: &[f32],
        fq: &mut [f32; 2],
        fp: &mut [f32; 2],
    ) {
        fq[0] = gp[0];
        fp[0] = -gq[0] - self.c * gp[0];
    }
}

#[test]
fn order_two_on_a_damped_oscillator() {
    // m = k = 1, c = 2 zeta: q(t) = e^(-zeta t) (cos wd t + zeta / wd sin wd t)
    // from q = 1, p = 0, wd = sqrt(1 - zeta^2).
    let zeta = 0.1f64;
    let sys = Damped {
        c: (2.0 * zeta) as f32,
    };
    let wd = (1.0 - zeta * zeta).sqrt();
    let t_end = 2.0f64;
    let exact = (-zeta * t_end).exp() * ((wd * t_end).cos() + zeta / wd * (wd * t_end).sin());
    let error = |dt: f32| {
        let it = Integrator {
            max_iterations: 100,
            tolerance: 1e-7,
            ..Integrator::new(Method::DiscreteGradient, dt)
        };
        let mut x = State::<2>::new(&[1.0], &[0.0]).unwrap();
        for _ in 0..(t_end / dt as f64).round() as usize {
            it.step(&sys, &mut x).unwrap();
        }
        (x.q[0] as f64 - exact).abs()
    };
    let e: Vec<f64> = [0.2f32, 0.1, 0.05].iter().map(|&dt| error(dt)).collect();
    let orders: Vec<f64> = e.windows(2).map(|w| (w[0] / w[1]).log2()).collect();
    println!(
        "damped oscillator errors {:.3e} {:.3e} {:.3e}, observed orders {orders:.3?}",
        e[0], e[1], e[2]
    );
    for o in orders {
        assert!((o - 2.0).abs() < 0.2, "observed order {o}");
    }
}
