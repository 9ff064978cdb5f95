//! Seeded generators, identical on every machine, so fixtures are
//! reproducible: SplitMix64 (Steele, Lea and Flood, "Fast splittable
//! pseudorandom number generators", OOPSLA 2014) for new fixtures, and
//! xorshift64* (Vigna, 2016), which the runtime's tests were validated with.
//! Both draw through [`Generator`], so every builder takes either.

/// A source of 64 random bits, and the draws fixtures need from it.
pub trait Generator {
    /// The next 64 random bits.
    fn next_u64(&mut self) -> u64;

    /// Uniform `f32` in [-1, 1) on a grid of 2^-23 (24 random bits).
    fn symmetric(&mut self) -> f32 {
        let unit = (self.next_u64() >> 40) as f32 / (1u64 << 24) as f32;
        2.0 * unit - 1.0
    }

    /// Uniform `f64` in [lo, hi) (53 random bits).
    fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * ((self.next_u64() >> 11) as f64 / (1u64 << 53) as f64)
    }

    /// An index in 0..n (n > 0; the modulo bias is negligible for fixtures).
    fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n.max(1) as u64) as usize
    }
}

/// The SplitMix64 generator; the field is its state (the seed).
#[derive(Debug, Clone)]
pub struct SplitMix64(pub u64);

impl Generator for SplitMix64 {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
}

/// The xorshift64* generator; the field is its state (a non-zero seed).
#[derive(Debug, Clone)]
pub struct XorShift64Star(pub u64);

impl Generator for XorShift64Star {
    fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_the_published_sequence() {
        // Rosetta Code, "Pseudo-random numbers/Splitmix64": the first five
        // outputs for seed 1234567.
        let mut rng = SplitMix64(1234567);
        let expected = [
            6457827717110365317u64,
            3203168211198807973,
            9817491932198370423,
            4593380528125082431,
            16408922859458223821,
        ];
        for want in expected {
            assert_eq!(rng.next_u64(), want);
        }
    }

    #[test]
    fn symmetric_and_uniform_stay_in_their_ranges() {
        let mut rng = SplitMix64(7);
        for _ in 0..10_000 {
            let s = rng.symmetric();
            assert!((-1.0..1.0).contains(&s));
            let u = rng.uniform(-0.2, 0.3);
            assert!((-0.2..0.3).contains(&u));
            assert!(rng.below(5) < 5);
        }
    }
}
