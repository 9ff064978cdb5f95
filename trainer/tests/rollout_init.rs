//! `visviva rollout` in the log's terms, through the binary: an initial
//! state given by velocities `v*` becomes momenta with the model's own mass
//! matrix p = M(q) v, and every row carries v = dH/dp beside p.
//! * A separable blob with T = p^2 / (2 m), m = 4 (the mass-spring kinetic
//!   energy, any textbook): p = m v and v = p / m on every row, exact in
//!   f32 (multiplying by 4 or 1/4 is exact in binary floating point, IEEE
//!   754).
//! * A mechanical blob, M(q)^-1 = e S^-1 (L L^T + eps I) S^-1 with L(z_q)
//!   from a tanh network (the format's definition, runtime/src/format.rs):
//!   p = o_p + M(q) v against that closed form evaluated in f64 from the
//!   blob's weights and inverted by nalgebra (a general-purpose reference
//!   crate), at three coordinates.
//! * Refusals: velocities for a model without a mass matrix (a general
//!   energy, a network kinetic term), a p and a v of one coordinate, or a
//!   mix of kinds, exit non-zero naming the flag and write no file.

mod cli_support;

use cli_support::{assert_ok, assert_refused, snapshot, snapshot_names, visviva_in};
use nalgebra::{Matrix2, Vector2};
use rand::{Rng, SeedableRng};
use visviva_runtime::format::Activation;
use visviva_runtime::{Integrator, Method};
use visviva_trainer::deploy::blob::{BlobModel, Energy, Kinetic, Layer, Mlp, Weights};

fn mlp(rng: &mut rand_chacha::ChaCha8Rng, sizes: &[usize]) -> Mlp {
    let layers = sizes
        .windows(2)
        .map(|w| Layer {
            inputs: w[0],
            outputs: w[1],
            weights: Weights::F32(
                (0..w[0] * w[1])
                    .map(|_| rng.random_range(-0.8..0.8))
                    .collect(),
            ),
            bias: (0..w[1]).map(|_| rng.random_range(-0.3..0.3)).collect(),
        })
        .collect();
    Mlp {
        activation: Activation::Tanh,
        layers,
    }
}

fn blob(dof: usize, offset: Vec<f32>, scale: Vec<f32>, e: f32, energy: Energy) -> BlobModel {
    let method = match energy {
        Energy::Separable {
            kinetic: Kinetic::Quadratic(_),
            ..
        } => Method::StormerVerlet,
        _ => Method::ImplicitMidpoint,
    };
    BlobModel {
        dof,
        offset,
        scale,
        energy_scale: e,
        energy,
        integrator: Integrator::new(method, 0.01),
        dissipation: None,
        input: None,
        envelope: None,
    }
}

/// The rows of a rollout CSV: header names and values.
fn read_csv(path: &std::path::Path) -> (Vec<String>, Vec<Vec<f32>>) {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header = lines
        .next()
        .unwrap()
        .split(',')
        .map(str::to_string)
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(|v| v.parse().unwrap()).collect())
        .collect();
    (header, rows)
}

fn write_blob(dir: &std::path::Path, name: &str, m: &BlobModel) {
    std::fs::write(dir.join(name), m.to_bytes().unwrap()).unwrap();
}

#[test]
fn velocities_of_a_point_mass_become_p_equals_m_v_and_every_row_has_v_equals_p_over_m() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    // T = 1/2 (L p)^2 with L = 1/2: m = 1 / L^2 = 4.
    let energy = Energy::Separable {
        potential: mlp(&mut rng, &[1, 8, 1]),
        kinetic: Kinetic::Quadratic(vec![0.5]),
    };
    write_blob(
        d,
        "m.vvb",
        &blob(1, vec![0.0; 2], vec![1.0; 2], 1.0, energy),
    );
    let o = visviva_in(
        d,
        &[
            "rollout",
            "--model",
            "m.vvb",
            "--init",
            "q1=0.3,v1=0.1",
            "--steps",
            "50",
            "--out",
            "v.csv",
        ],
    );
    assert_ok(&o);
    let (header, rows) = read_csv(&d.join("v.csv"));
    assert_eq!(header, ["t", "q1", "p1", "v1"]);
    assert_eq!(rows.len(), 51);
    assert_eq!(rows[0][1], 0.3);
    assert_eq!(rows[0][2], 4.0 * 0.1f32, "p = m v");
    for r in &rows {
        assert_eq!(r[3], 0.25 * r[2], "v = p / m at t = {}", r[0]);
    }
    // The same state given by its momentum rolls out bit for bit alike.
    let o = visviva_in(
        d,
        &[
            "rollout",
            "--model",
            "m.vvb",
            "--init",
            "q1=0.3,p1=0.4",
            "--steps",
            "50",
            "--out",
            "p.csv",
        ],
    );
    assert_ok(&o);
    assert_eq!(read_csv(&d.join("p.csv")).1, rows);
}

/// The network in f64: tanh hidden layers, a linear last layer.
fn mlp_f64(m: &Mlp, x: &[f64]) -> Vec<f64> {
    let mut h = x.to_vec();
    for (k, l) in m.layers.iter().enumerate() {
        let w = l.real_weights();
        let mut out: Vec<f64> = (0..l.outputs)
            .map(|i| {
                (0..l.inputs)
                    .map(|j| w[i * l.inputs + j] as f64 * h[j])
                    .sum::<f64>()
                    + l.bias[i] as f64
            })
            .collect();
        if k + 1 < m.layers.len() {
            out.iter_mut().for_each(|v| *v = v.tanh());
        }
        h = out;
    }
    h
}

/// M(q) of a two-dof mechanical blob in f64: M^-1 = e S^-1 (L L^T + eps I)
/// S^-1 with L = [[softplus(r0), 0], [r1, softplus(r2)]], inverted by
/// nalgebra.
fn mass_matrix(b: &BlobModel, q: [f64; 2]) -> Matrix2<f64> {
    let Energy::Mechanical { factor, floor, .. } = &b.energy else {
        unreachable!()
    };
    let z: Vec<f64> = (0..2)
        .map(|i| (q[i] - b.offset[i] as f64) / b.scale[i] as f64)
        .collect();
    let r = mlp_f64(factor, &z);
    let softplus = |x: f64| x.exp().ln_1p();
    let l = Matrix2::new(softplus(r[0]), 0.0, r[1], softplus(r[2]));
    let a = l * l.transpose() + Matrix2::identity() * *floor as f64;
    let s = Matrix2::from_diagonal(&Vector2::new(b.scale[2] as f64, b.scale[3] as f64));
    let s_inv = s.try_inverse().unwrap();
    (s_inv * a * s_inv * b.energy_scale as f64)
        .try_inverse()
        .unwrap()
}

#[test]
fn velocities_of_a_mechanical_blob_become_p_equals_m_of_q_v() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let energy = Energy::Mechanical {
        factor: mlp(&mut rng, &[2, 8, 3]),
        floor: 0.01,
        potential: mlp(&mut rng, &[2, 8, 1]),
    };
    let b = blob(
        2,
        vec![0.1, -0.2, 0.05, -0.1],
        vec![0.8, 1.3, 1.7, 0.6],
        1.5,
        energy,
    );
    write_blob(d, "m.vvb", &b);
    let mut worst = 0.0f64;
    for (k, (q, v)) in [
        // f32, as the binary parses them.
        ([0.3f32, -0.4], [0.1f32, 0.25]),
        ([-1.2, 0.9], [-0.7, 0.05]),
        ([2.0, 1.5], [0.4, -0.3]),
    ]
    .iter()
    .enumerate()
    {
        let init = format!("q1={},q2={},v1={},v2={}", q[0], q[1], v[0], v[1]);
        let out = format!("r{k}.csv");
        assert_ok(&visviva_in(
            d,
            &[
                "rollout", "--model", "m.vvb", "--init", &init, "--steps", "3", "--out", &out,
            ],
        ));
        let (header, rows) = read_csv(&d.join(&out));
        assert_eq!(header, ["t", "q1", "q2", "p1", "p2", "v1", "v2"]);
        let m = mass_matrix(&b, [q[0] as f64, q[1] as f64]);
        let p = m * Vector2::new(v[0] as f64, v[1] as f64);
        let scale = p.amax().max(1e-3);
        for i in 0..2 {
            // p = o_p + M(q) v (the offset enters as in the format).
            let exact = b.offset[2 + i] as f64 + p[i];
            let err = (rows[0][3 + i] as f64 - exact).abs() / scale;
            worst = worst.max(err);
            assert!(
                err < 1e-4,
                "state {k} p{}: {} vs {exact}",
                i + 1,
                rows[0][3 + i]
            );
            // The v column at the start is the velocity given.
            let dv = (rows[0][5 + i] as f64 - v[i] as f64).abs() / (v[i] as f64).abs().max(0.1);
            assert!(dv < 1e-4, "state {k} v{}: {}", i + 1, rows[0][5 + i]);
        }
    }
    println!("mechanical p = M(q) v: worst relative error {worst:.2e}");
}

#[test]
fn velocities_without_a_mass_matrix_and_mixed_keys_are_refused_without_a_file() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let general = Energy::General(mlp(&mut rng, &[2, 8, 1]));
    write_blob(
        d,
        "g.vvb",
        &blob(1, vec![0.0; 2], vec![1.0; 2], 1.0, general),
    );
    let network = Energy::Separable {
        potential: mlp(&mut rng, &[1, 8, 1]),
        kinetic: Kinetic::Network(mlp(&mut rng, &[1, 8, 1])),
    };
    write_blob(
        d,
        "n.vvb",
        &blob(1, vec![0.0; 2], vec![1.0; 2], 1.0, network),
    );
    let quadratic = Energy::Separable {
        potential: mlp(&mut rng, &[2, 8, 1]),
        kinetic: Kinetic::Quadratic(vec![1.0, 0.0, 1.0]),
    };
    write_blob(
        d,
        "s.vvb",
        &blob(2, vec![0.0; 4], vec![1.0; 4], 1.0, quadratic),
    );
    let before = snapshot(d);
    let names = snapshot_names(d);
    let cases: [(&str, &str, &[&str]); 5] = [
        (
            "g.vvb",
            "q1=0.1,v1=0.2",
            &["--init", "not quadratic in p", "p1..p1"],
        ),
        ("n.vvb", "q1=0.1,v1=0.2", &["--init", "not quadratic in p"]),
        (
            "s.vvb",
            "q1=0,q2=0,p1=0.1,v1=0.2,p2=0",
            &["--init", "p1 and v1 both given"],
        ),
        (
            "s.vvb",
            "q1=0,q2=0,p1=0.1,v2=0.2",
            &["--init", "p1 and v2 mix"],
        ),
        ("s.vvb", "q1=0,q2=0,v1=0.1", &["--init", "v2 missing"]),
    ];
    for (model, init, needles) in cases {
        let o = visviva_in(
            d,
            &[
                "rollout", "--model", model, "--init", init, "--steps", "5", "--out", "o.csv",
            ],
        );
        assert_refused(&o, 1, needles);
    }
    cli_support::assert_unchanged(&before, d, "refused rollouts");
    assert_eq!(snapshot_names(d), names);
}
