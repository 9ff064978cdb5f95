//! Excitation signals for driven systems: seeded multisines.

use rand::Rng;
use rand_chacha::ChaCha8Rng;
use std::f64::consts::PI;

use crate::reference::params::uniform;

/// One smooth excitation signal per input: u_j(t) = sum_k a_jk sin(2 pi
/// f_jk t + phi_jk) (a multisine; zero mean, so a driven free rotor's
/// angle stays bounded on average). An empty signal is u = 0.
#[derive(Debug, Clone, PartialEq)]
pub struct Multisine {
    /// Per input: (amplitude, frequency in Hz, phase in rad) of each tone.
    pub tones: Vec<Vec<(f64, f64, f64)>>,
}

impl Multisine {
    /// No input.
    pub fn none() -> Self {
        Self { tones: Vec::new() }
    }

    /// `count` tones per input, frequencies log-uniform in [f_lo, f_hi] Hz,
    /// phases uniform, each tone of amplitude `amplitude / sqrt(count)` (so
    /// the RMS is about `amplitude / sqrt(2)`).
    pub fn random(
        rng: &mut ChaCha8Rng,
        inputs: usize,
        count: usize,
        amplitude: f64,
        f_lo: f64,
        f_hi: f64,
    ) -> Self {
        let a = amplitude / (count as f64).sqrt();
        let tones = (0..inputs)
            .map(|_| {
                (0..count)
                    .map(|_| {
                        let f = f_lo * (f_hi / f_lo).powf(rng.random::<f64>());
                        (a, f, uniform(rng, 0.0, 2.0 * PI))
                    })
                    .collect()
            })
            .collect();
        Self { tones }
    }

    /// u(t) into `u` (one value per input).
    pub fn value(&self, t: f64, u: &mut [f64]) {
        for (out, tones) in u.iter_mut().zip(&self.tones) {
            *out = tones
                .iter()
                .map(|(a, f, phi)| a * (2.0 * PI * f * t + phi).sin())
                .sum();
        }
    }
}
