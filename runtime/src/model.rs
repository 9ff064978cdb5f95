//! A parsed, validated model borrowing its weights from the blob bytes, and
//! its physical-unit energy, gradient and time step.
//!
//! `D` bounds the degrees of freedom and `W` the layer width; both are
//! checked when the blob is parsed, and they size every buffer on the stack.

use crate::energy::Energy;
use crate::error::{BlobError, Section, StepError};
use crate::format::{
    self, DissipationDesc, EnergyDesc, F32Bytes, Fields, InputDesc, TrainingEnvelope,
};
use crate::hamiltonian::Hamiltonian;
use crate::integrate::Integrator;
use crate::mlp::Mlp;
use crate::state::State;

#[cfg(feature = "observer")]
mod tangent;

/// A port matrix (the factor L of R, or G): constant, or a network of the
/// normalized coordinates z_q whose outputs are the entries.
#[derive(Debug, Clone, Copy)]
enum PortMatrix<'a, const W: usize> {
    Constant(F32Bytes<'a>),
    Network(Mlp<'a, W>),
}

/// The entries of a port matrix at one state.
enum Entries<'a, const W: usize> {
    Stored(F32Bytes<'a>),
    Computed([f32; W]),
}

impl<const W: usize> Entries<'_, W> {
    /// Entry `i` (NaN out of range; shapes are validated at parse time).
    #[inline(always)]
    fn get(&self, i: usize) -> f32 {
        match self {
            Self::Stored(m) => m.get(i),
            Self::Computed(v) => v.get(i).copied().unwrap_or(f32::NAN),
        }
    }
}

impl<'a, const W: usize> PortMatrix<'a, W> {
    /// Validate a constant of `entries` values or a network of `n` inputs
    /// and `entries` outputs.
    fn constant(m: F32Bytes<'a>, entries: usize, section: Section) -> Result<Self, BlobError> {
        if m.0.len() != 4 * entries {
            return Err(BlobError::ShapeMismatch { section, layer: 0 });
        }
        if !m.iter().all(f32::is_finite) {
            return Err(BlobError::NonFinite { section });
        }
        Ok(Self::Constant(m))
    }

    fn network(
        desc: &format::MlpDesc<'a>,
        n: usize,
        entries: usize,
        section: Section,
    ) -> Result<Self, BlobError> {
        Ok(Self::Network(Mlp::validate(desc, n, entries, section)?))
    }

    /// The entries at normalized coordinates `zq`: a constant's values are
    /// read in place; a network's are computed.
    #[inline]
    fn entries(&self, zq: &[f32]) -> Entries<'a, W> {
        match self {
            Self::Constant(m) => Entries::Stored(*m),
            Self::Network(net) => {
                let mut buf = [0.0f32; W];
                net.evaluate(zq, &mut buf);
                Entries::Computed(buf)
            }
        }
    }

    /// Multiply-accumulates of producing the entries (0 for a constant).
    fn macs(&self) -> u32 {
        match self {
            Self::Constant(_) => 0,
            Self::Network(net) => net.macs_forward(),
        }
    }

    /// Learned parameters.
    fn parameters(&self) -> u32 {
        match self {
            Self::Constant(m) => m.len() as u32,
            Self::Network(net) => net.parameters(),
        }
    }
}

/// Work one model costs, from the shapes in its blob.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Cost {
    /// Learned parameters (weights, biases, mass factor).
    pub parameters: u32,
    /// Multiply-accumulates of one full gradient dH/dx.
    pub macs_per_gradient: u32,
    /// Multiply-accumulates of one `step` with the stored integrator (for
    /// implicit midpoint: the bound at the iteration limit).
    pub macs_per_step: u32,
    /// Bytes of the `Model` value itself.
    pub model_bytes: u32,
    /// Bytes of network scratch buffers on the stack during a gradient.
    pub scratch_bytes: u32,
}

/// A learned Hamiltonian model, ready to evaluate and step.
#[derive(Debug, Clone, Copy)]
pub struct Model<'a, const D: usize = 8, const W: usize = 128> {
    dof: usize,
    offset_q: [f32; D],
    scale_q: [f32; D],
    scale_p: [f32; D],
    offset_p: [f32; D],
    energy_scale: f32,
    energy: Energy<'a, W>,
    integrator: Integrator,
    /// Lower-triangular factor L of R = L L^T over the 2n coordinates.
    dissipation: Option<PortMatrix<'a, W>>,
    /// Number of inputs m and G (2n x m, row-major).
    input: Option<(usize, PortMatrix<'a, W>)>,
    /// Per-coordinate bounds of the training states, when the blob has them.
    envelope: Option<TrainingEnvelope<'a>>,
}

impl<'a, const D: usize, const W: usize> Model<'a, D, W> {
    /// Parse and validate a blob. Never panics; every defect is a
    /// [`BlobError`]. Weights stay in `bytes` (no copy).
    ///
    /// Never inlined: the decoder's temporaries (the whole description,
    /// several hundred bytes) then leave the stack before the first step
    /// instead of staying in the caller's frame.
    #[inline(never)]
    pub fn from_bytes(bytes: &'a [u8]) -> Result<Self, BlobError> {
        // Every decoding check of `format::decode` first, in its order; then
        // the fields again, one section at a time, validated in order.
        let mut fields = format::check_fields(bytes)?;
        let n = fields.take::<u8>()? as usize;
        let offset: F32Bytes<'a> = fields.take()?;
        let scale: F32Bytes<'a> = fields.take()?;
        let es: f32 = fields.take()?;
        let max = D.min(crate::MAX_DOF_SUPPORTED);
        if n == 0 || n > max {
            return Err(BlobError::DofOutOfRange {
                dof: n as u32,
                max: max as u32,
            });
        }
        let norm = Section::Normalization;
        if offset.0.len() != 8 * n || scale.0.len() != 8 * n {
            return Err(BlobError::ShapeMismatch {
                section: norm,
                layer: 0,
            });
        }
        if !offset.iter().chain(scale.iter()).all(f32::is_finite) {
            return Err(BlobError::NonFinite { section: norm });
        }
        if !scale.iter().all(|s| s > 0.0) {
            return Err(BlobError::NotPositive { section: norm });
        }
        if !scale.iter().all(format::scale_in_range) || !offset.iter().all(format::offset_in_range)
        {
            return Err(BlobError::OutOfRange { section: norm });
        }
        Self::check_energy_scale(es)?;
        let energy = Self::read_energy(&mut fields, n)?;
        let integrator: Integrator = fields.take()?;
        let dissipation = Self::read_dissipation(&mut fields, n)?;
        let input = Self::read_input(&mut fields, n)?;
        let envelope = Self::read_envelope(&mut fields, n)?;
        let mut m = Self {
            dof: n,
            offset_q: [0.0; D],
            offset_p: [0.0; D],
            scale_q: [1.0; D],
            scale_p: [1.0; D],
            energy_scale: es,
            energy,
            integrator,
            dissipation,
            input,
            envelope,
        };
        for i in 0..n {
            m.offset_q[i] = offset.get(i);
            m.offset_p[i] = offset.get(n + i);
            m.scale_q[i] = scale.get(i);
            m.scale_p[i] = scale.get(n + i);
        }
        m.check_integrator(integrator)?;
        Ok(m)
    }

    /// The energy scale: finite, positive, in the format's scale range.
    fn check_energy_scale(es: f32) -> Result<(), BlobError> {
        let section = Section::EnergyScale;
        if !es.is_finite() {
            return Err(BlobError::NonFinite { section });
        }
        if es <= 0.0 {
            return Err(BlobError::NotPositive { section });
        }
        if !format::scale_in_range(es) {
            return Err(BlobError::OutOfRange { section });
        }
        Ok(())
    }

    /// The energy section, decoded and validated in its own stack frame.
    #[inline(never)]
    fn read_energy(fields: &mut Fields<'a>, n: usize) -> Result<Energy<'a, W>, BlobError> {
        Energy::validate(&fields.take::<EnergyDesc<'a>>()?, n)
    }

    /// The dissipation section (the factor L of R = L L^T).
    #[inline(never)]
    fn read_dissipation(
        fields: &mut Fields<'a>,
        n: usize,
    ) -> Result<Option<PortMatrix<'a, W>>, BlobError> {
        let n2 = 2 * n;
        let l_entries = n2 * (n2 + 1) / 2;
        let section = Section::Dissipation;
        Ok(match fields.take::<DissipationDesc<'a>>()? {
            DissipationDesc::None => None,
            _ if !cfg!(feature = "port-terms") => {
                return Err(BlobError::NotInThisBuild { section })
            }
            DissipationDesc::Constant { factor } => {
                Some(PortMatrix::constant(factor, l_entries, section)?)
            }
            DissipationDesc::Network(net) => {
                Some(PortMatrix::network(&net, n, l_entries, section)?)
            }
        })
    }

    /// The input section: the number of inputs m and G.
    #[inline(never)]
    fn read_input(
        fields: &mut Fields<'a>,
        n: usize,
    ) -> Result<Option<(usize, PortMatrix<'a, W>)>, BlobError> {
        let n2 = 2 * n;
        let section = Section::InputCoupling;
        let input_count = |inputs: u8| {
            let m = inputs as usize;
            if m == 0 || m > crate::MAX_INPUTS {
                Err(BlobError::ShapeMismatch { section, layer: 0 })
            } else {
                Ok(m)
            }
        };
        Ok(match fields.take::<InputDesc<'a>>()? {
            InputDesc::None => None,
            _ if !cfg!(feature = "port-terms") => {
                return Err(BlobError::NotInThisBuild { section })
            }
            InputDesc::Constant { inputs, matrix } => {
                let m = input_count(inputs)?;
                Some((m, PortMatrix::constant(matrix, n2 * m, section)?))
            }
            InputDesc::Network { inputs, net } => {
                let m = input_count(inputs)?;
                Some((m, PortMatrix::network(&net, n, n2 * m, section)?))
            }
        })
    }

    /// The training envelope, when the blob has one: 2n lower and 2n upper
    /// bounds (q then p), each finite, within +-`MAX_OFFSET`, lower <= upper.
    #[inline(never)]
    fn read_envelope(
        fields: &mut Fields<'a>,
        n: usize,
    ) -> Result<Option<TrainingEnvelope<'a>>, BlobError> {
        let Some(env) = fields.take_trailing::<TrainingEnvelope<'a>>()? else {
            return Ok(None);
        };
        let section = Section::Envelope;
        let (lo, hi) = (env.lower, env.upper);
        if lo.0.len() != 8 * n || hi.0.len() != 8 * n {
            return Err(BlobError::EnvelopeCount {
                found: lo.len().min(hi.len()) as u32,
                expected: 2 * n as u32,
            });
        }
        // One pass over the coordinates (the first defect found is named).
        for k in 0..2 * n {
            let (l, h) = (lo.get(k), hi.get(k));
            if !(l.is_finite() && h.is_finite()) {
                return Err(BlobError::NonFinite { section });
            }
            if !(format::offset_in_range(l) && format::offset_in_range(h)) {
                return Err(BlobError::OutOfRange { section });
            }
            if l > h {
                return Err(BlobError::EnvelopeInverted {
                    coordinate: k as u8,
                });
            }
        }
        Ok(Some(env))
    }

    /// The same model with other integrator settings, checked as at parse
    /// time (a separable-only method on a general model is refused).
    pub fn with_integrator(mut self, integrator: Integrator) -> Result<Self, BlobError> {
        self.check_integrator(integrator)?;
        self.integrator = integrator;
        Ok(self)
    }

    /// Whether `integrator` may step this model (checked by reference, so
    /// parsing does not move the model through another `Result`).
    fn check_integrator(&self, integrator: Integrator) -> Result<(), BlobError> {
        if !integrator.is_valid() {
            return Err(BlobError::BadIntegratorSettings);
        }
        if !integrator.method.is_built() {
            return Err(BlobError::NotInThisBuild {
                section: Section::Integrator,
            });
        }
        if integrator.method.needs_separable() && !self.energy.is_separable() {
            return Err(BlobError::MethodNeedsSeparableModel);
        }
        if self.has_port_terms() && !integrator.method.handles_port_terms() {
            return Err(BlobError::MethodIgnoresPortTerms);
        }
        Ok(())
    }

    /// The integrator settings in use.
    pub fn integrator(&self) -> Integrator {
        self.integrator
    }

    /// Advance `x` by one time step with the model's integrator (inputs,
    /// if the model has any, held at zero).
    pub fn step(&self, x: &mut State<D>) -> Result<(), StepError> {
        self.integrator.step(self, x)
    }

    /// Advance `x` by one time step with input `u` (`inputs()` values) held
    /// constant over the step.
    pub fn step_driven(&self, x: &mut State<D>, u: &[f32]) -> Result<(), StepError> {
        self.integrator.step_driven(self, x, u)
    }

    /// Degrees of freedom n: a state holds n coordinates and n momenta.
    pub fn dof(&self) -> usize {
        self.dof
    }

    /// The energy scale the blob states: the training data's typical
    /// energy, the unit in which the learned energy's drift is judged.
    pub fn energy_scale(&self) -> f32 {
        self.energy_scale
    }

    /// The per-coordinate bounds of the states the model was trained on
    /// (q1..qn then p1..pn, physical units, already widened by the writer;
    /// see [`crate::format`]), or `None` when the blob carries no envelope.
    /// Borrowed from the blob: no copy, no heap.
    pub fn envelope(&self) -> Option<TrainingEnvelope<'a>> {
        self.envelope
    }

    /// Number of inputs m that `step_driven` takes (0 for an autonomous model).
    pub fn inputs(&self) -> usize {
        self.input.map_or(0, |(m, _)| m)
    }

    /// Work and memory this model costs.
    pub fn cost(&self) -> Cost {
        let n = self.dof;
        let (v, t) = self.energy.macs(n);
        let it = self.integrator;
        let (calls_a, calls_b) = it.method.gradient_calls(it.max_iterations, it.substeps);
        let n2 = (2 * n) as u32;
        let port = self.dissipation.map_or(0, |l| n2 * (n2 + 1) + l.macs())
            + self.input.map_or(0, |(m, g)| n2 * m as u32 + g.macs());
        let per_step = if self.energy.is_separable() && it.method.needs_separable() {
            calls_a * v + calls_b * t
        } else {
            calls_a * (v + t + port)
        };
        Cost {
            parameters: self.energy.parameters(n)
                + self.dissipation.map_or(0, |l| l.parameters())
                + self.input.map_or(0, |(_, g)| g.parameters()),
            macs_per_gradient: v + t,
            macs_per_step: per_step,
            model_bytes: core::mem::size_of::<Self>() as u32,
            scratch_bytes: ((format::MAX_LAYERS + 4) * W * 4) as u32,
        }
    }

    fn check(&self, x: &State<D>) -> Result<(), StepError> {
        if x.dof() != self.dof {
            return Err(StepError::DofMismatch {
                model: self.dof as u32,
                state: x.dof() as u32,
            });
        }
        if !x.is_finite() {
            return Err(StepError::NonFiniteState);
        }
        Ok(())
    }

    /// The gradient of one separable half (coordinates or momenta) in
    /// physical units: normalize, let `grad` write dE/dz, then
    /// dH/dv_i = energy_scale * dE/dz_i / scale_i.
    fn half_gradient(
        &self,
        v: &[f32; D],
        off: &[f32; D],
        sc: &[f32; D],
        out: &mut [f32; D],
        grad: impl FnOnce(&[f32], &mut [f32]),
    ) {
        let n = self.dof;
        let mut z = [0.0f32; D];
        let mut g = [0.0f32; D];
        Self::normalize(v, off, sc, n, &mut z);
        grad(&z[..n], &mut g[..n]);
        for i in 0..n {
            out[i] = self.energy_scale * g[i] / sc[i];
        }
    }

    /// dH/dq and dH/dp of a mechanical energy in physical units:
    /// dH/dx_i = energy_scale * dE/dz_i / scale_i.
    fn mechanical_gradient(
        &self,
        m: &crate::energy::Mechanical<'_, W>,
        x: &State<D>,
        dh_dq: &mut [f32; D],
        dh_dp: &mut [f32; D],
    ) {
        let n = self.dof;
        let (mut zq, mut zp) = ([0.0f32; D], [0.0f32; D]);
        let (mut gq, mut gp) = ([0.0f32; D], [0.0f32; D]);
        Self::normalize(&x.q, &self.offset_q, &self.scale_q, n, &mut zq);
        Self::normalize(&x.p, &self.offset_p, &self.scale_p, n, &mut zp);
        m.value_and_gradient(&zq[..n], &zp[..n], &mut gq[..n], &mut gp[..n]);
        for i in 0..n {
            dh_dq[i] = self.energy_scale * gq[i] / self.scale_q[i];
            dh_dp[i] = self.energy_scale * gp[i] / self.scale_p[i];
        }
    }

    fn normalize(v: &[f32; D], off: &[f32; D], sc: &[f32; D], n: usize, z: &mut [f32]) {
        for i in 0..n {
            z[i] = (v[i] - off[i]) / sc[i];
        }
    }
}

impl<const D: usize, const W: usize> Hamiltonian<D> for Model<'_, D, W> {
    fn dof(&self) -> usize {
        self.dof
    }

    fn is_separable(&self) -> bool {
        self.energy.is_separable()
    }

    fn inputs(&self) -> usize {
        Model::inputs(self)
    }

    fn has_port_terms(&self) -> bool {
        self.dissipation.is_some() || self.input.is_some()
    }

    fn metric(&self, wq: &mut [f32; D], wp: &mut [f32; D]) {
        for i in 0..D {
            wq[i] = 1.0 / (self.scale_q[i] * self.scale_q[i]);
            wp[i] = 1.0 / (self.scale_p[i] * self.scale_p[i]);
        }
    }

    fn energy_term_size(&self) -> f32 {
        self.energy_scale.abs()
    }

    fn field_from_gradient(
        &self,
        q: &[f32; D],
        gq: &[f32; D],
        gp: &[f32; D],
        u: &[f32],
        fq: &mut [f32; D],
        fp: &mut [f32; D],
    ) {
        let n = self.dof;
        for i in 0..n {
            fq[i] = gp[i];
            fp[i] = -gq[i];
        }
        if !cfg!(feature = "port-terms") {
            return; // no blob with port terms parses in this build
        }
        // Coordinate k of the 2n-vectors: q for k < n, p after.
        let at = |a: &[f32; D], b: &[f32; D], k: usize| if k < n { a[k] } else { b[k - n] };
        let n2 = 2 * n;
        let mut zq = [0.0f32; D];
        if matches!(self.dissipation, Some(PortMatrix::Network(_)))
            || matches!(self.input, Some((_, PortMatrix::Network(_))))
        {
            Self::normalize(q, &self.offset_q, &self.scale_q, n, &mut zq);
        }
        let zq = &zq[..n];
        if let Some(l) = &self.dissipation {
            let l = l.entries(zq);
            // v = L^T g, then R g = L v; f -= R g.
            let mut v = [0.0f32; 2 * crate::MAX_DOF_SUPPORTED];
            for j in 0..n2 {
                let mut acc = 0.0f32;
                for i in j..n2 {
                    acc += l.get(i * (i + 1) / 2 + j) * at(gq, gp, i);
                }
                v[j] = acc;
            }
            for i in 0..n2 {
                let mut acc = 0.0f32;
                for j in 0..=i {
                    acc += l.get(i * (i + 1) / 2 + j) * v[j];
                }
                if i < n {
                    fq[i] -= acc;
                } else {
                    fp[i - n] -= acc;
                }
            }
        }
        if let Some((m, g)) = &self.input {
            let (m, g) = (*m, g.entries(zq));
            for i in 0..n2 {
                let mut acc = 0.0f32;
                for (k, uk) in u.iter().enumerate().take(m) {
                    acc += g.get(i * m + k) * uk;
                }
                if i < n {
                    fq[i] += acc;
                } else {
                    fp[i - n] += acc;
                }
            }
        }
    }

    fn energy(&self, x: &State<D>) -> Result<f32, StepError> {
        self.check(x)?;
        let n = self.dof;
        let mut zq = [0.0f32; D];
        let mut zp = [0.0f32; D];
        Self::normalize(&x.q, &self.offset_q, &self.scale_q, n, &mut zq);
        Self::normalize(&x.p, &self.offset_p, &self.scale_p, n, &mut zp);
        let e = match &self.energy {
            Energy::General(m) if cfg!(feature = "general") => {
                let mut z = [0.0f32; 32];
                z[..n].copy_from_slice(&zq[..n]);
                z[n..2 * n].copy_from_slice(&zp[..n]);
                m.value(&z[..2 * n])
            }
            Energy::Separable { potential, kinetic } if cfg!(feature = "separable") => {
                potential.value(&zq[..n]) + kinetic.eval(&zp[..n], None)
            }
            Energy::Mechanical(m) if cfg!(feature = "mechanical") => m.value(&zq[..n], &zp[..n]),
            // A kind this build leaves out never parses.
            _ => return Err(StepError::NotSeparable),
        };
        Ok(self.energy_scale * e)
    }

    fn gradient(
        &self,
        x: &State<D>,
        dh_dq: &mut [f32; D],
        dh_dp: &mut [f32; D],
    ) -> Result<(), StepError> {
        self.check(x)?;
        match &self.energy {
            Energy::General(m) if cfg!(feature = "general") => {
                let n = self.dof;
                let mut z = [0.0f32; 32];
                let mut g = [0.0f32; 32];
                Self::normalize(&x.q, &self.offset_q, &self.scale_q, n, &mut z[..n]);
                Self::normalize(&x.p, &self.offset_p, &self.scale_p, n, &mut z[n..2 * n]);
                m.value_and_gradient(&z[..2 * n], &mut g[..2 * n]);
                for i in 0..n {
                    dh_dq[i] = self.energy_scale * g[i] / self.scale_q[i];
                    dh_dp[i] = self.energy_scale * g[n + i] / self.scale_p[i];
                }
                Ok(())
            }
            Energy::Separable { .. } if cfg!(feature = "separable") => {
                self.potential_gradient(&x.q, dh_dq)?;
                self.kinetic_gradient(&x.p, dh_dp)
            }
            Energy::Mechanical(m) if cfg!(feature = "mechanical") => {
                self.mechanical_gradient(m, x, dh_dq, dh_dp);
                Ok(())
            }
            // A kind this build leaves out never parses.
            _ => Err(StepError::NotSeparable),
        }
    }

    fn potential_gradient(&self, q: &[f32; D], out: &mut [f32; D]) -> Result<(), StepError> {
        let Energy::Separable { potential, .. } = &self.energy else {
            return Err(StepError::NotSeparable);
        };
        if !cfg!(feature = "separable") {
            return Err(StepError::NotSeparable);
        }
        self.half_gradient(q, &self.offset_q, &self.scale_q, out, |z, g| {
            potential.value_and_gradient(z, g);
        });
        Ok(())
    }

    fn kinetic_gradient(&self, p: &[f32; D], out: &mut [f32; D]) -> Result<(), StepError> {
        let Energy::Separable { kinetic, .. } = &self.energy else {
            return Err(StepError::NotSeparable);
        };
        if !cfg!(feature = "separable") {
            return Err(StepError::NotSeparable);
        }
        self.half_gradient(p, &self.offset_p, &self.scale_p, out, |z, g| {
            kinetic.eval(z, Some(g));
        });
        Ok(())
    }
}
