//! Adam (Kingma & Ba, 2015) over a flat parameter vector, a learning-rate
//! schedule (linear warm-up, then cosine decay to a floor) and global-norm
//! gradient clipping.

/// Adam state and settings.
#[derive(Debug, Clone)]
pub struct Adam {
    /// First-moment decay (0.9 in the paper).
    pub beta1: f32,
    /// Second-moment decay (0.999 in the paper).
    pub beta2: f32,
    /// Denominator guard (1e-8 in the paper).
    pub epsilon: f32,
    m: Vec<f32>,
    v: Vec<f32>,
    t: u32,
}

impl Adam {
    /// Adam for `len` parameters with the paper's default constants.
    pub fn new(len: usize) -> Self {
        Self {
            beta1: 0.9,
            beta2: 0.999,
            epsilon: 1e-8,
            m: vec![0.0; len],
            v: vec![0.0; len],
            t: 0,
        }
    }

    /// One update of `params` with gradient `grad` and learning rate `lr`
    /// (Algorithm 1 of the paper, bias-corrected moments).
    pub fn step(&mut self, params: &mut [f32], grad: &[f32], lr: f32) {
        self.t += 1;
        let (b1, b2) = (self.beta1, self.beta2);
        let c1 = 1.0 - b1.powi(self.t as i32);
        let c2 = 1.0 - b2.powi(self.t as i32);
        for ((p, g), (m, v)) in params
            .iter_mut()
            .zip(grad)
            .zip(self.m.iter_mut().zip(self.v.iter_mut()))
        {
            *m = b1 * *m + (1.0 - b1) * g;
            *v = b2 * *v + (1.0 - b2) * g * g;
            let mh = *m / c1;
            let vh = *v / c2;
            *p -= lr * mh / (vh.sqrt() + self.epsilon);
        }
    }
}

/// Learning rate over the run: linear warm-up from ~0 to `peak` over
/// `warmup` steps, then half-cosine decay to `peak * floor` at `total`
/// (common practice).
#[derive(Debug, Clone, Copy)]
pub struct Schedule {
    /// Peak learning rate.
    pub peak: f32,
    /// Warm-up steps.
    pub warmup: usize,
    /// Total steps.
    pub total: usize,
    /// Final rate as a fraction of the peak.
    pub floor: f32,
}

impl Schedule {
    /// The rate at step `step` (0-based).
    pub fn rate(&self, step: usize) -> f32 {
        if step < self.warmup {
            return self.peak * (step + 1) as f32 / self.warmup as f32;
        }
        let span = self.total.saturating_sub(self.warmup).max(1);
        let frac = ((step - self.warmup) as f32 / span as f32).min(1.0);
        let cos = 0.5 * (1.0 + (std::f32::consts::PI * frac).cos());
        self.peak * (self.floor + (1.0 - self.floor) * cos)
    }
}

/// Scale `grad` so its Euclidean norm is at most `max_norm`; returns the
/// norm before clipping.
pub fn clip_global_norm(grad: &mut [f32], max_norm: f32) -> f32 {
    let norm = grad
        .iter()
        .map(|g| (*g as f64) * (*g as f64))
        .sum::<f64>()
        .sqrt() as f32;
    if norm > max_norm && norm.is_finite() {
        let k = max_norm / norm;
        grad.iter_mut().for_each(|g| *g *= k);
    }
    norm
}
