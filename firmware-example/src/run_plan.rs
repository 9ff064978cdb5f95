//! The run plan: initial states, step count and, for a driven model, the
//! input sequence, chosen at build time (`VISVIVA_RUN_PLAN` names the file).
//! Layout, all little-endian:
//!
//! ```text
//! offset  size            field
//! 0       4               tag b"VRUN"
//! 4       4               layout version (u32): 1, or 2 with inputs
//! 8       4               degrees of freedom n (u32)
//! 12      4               number of initial states S (u32)
//! 16      4               steps per rollout K (u32)
//! 20      4               (version 2 only) inputs per step m (u32)
//! H       S * 2n * 4      initial states, each q1..qn then p1..pn, as f32
//! ...     K * m * 4       (version 2 only) inputs u1..um held over step k,
//!                         k = 1..K, the same for every initial state
//! ```
//! H is 20 for version 1 and 24 for version 2.

/// The plan embedded in this build.
pub static EMBEDDED_PLAN: &[u8] = include_bytes!(env!(
    "VISVIVA_RUN_PLAN",
    "set VISVIVA_RUN_PLAN to a run plan file to build the test harness (`cargo xtask device` does)"
));

const TAG: [u8; 4] = *b"VRUN";
/// Inputs per step the firmware can hold.
pub const MAX_INPUTS: usize = visviva_runtime::MAX_INPUTS;

/// Why a plan was refused.
#[derive(Debug, Clone, Copy, defmt::Format)]
pub enum PlanError {
    /// Tag or layout version wrong.
    NotARunPlan,
    /// The degrees of freedom exceed the firmware's bound or are zero.
    DofOutOfRange { dof: u32 },
    /// More inputs than the firmware holds.
    TooManyInputs { inputs: u32 },
    /// The byte length disagrees with the header.
    WrongLength { expected: u32, found: u32 },
}

/// A validated plan borrowing its bytes.
pub struct RunPlan<'a> {
    dof: usize,
    states: usize,
    steps: u32,
    inputs: usize,
    values: &'a [u8],
    input_values: &'a [u8],
}

fn word(bytes: &[u8], at: usize) -> u32 {
    match bytes.get(at..at + 4) {
        Some(&[a, b, c, d]) => u32::from_le_bytes([a, b, c, d]),
        _ => 0,
    }
}

impl<'a> RunPlan<'a> {
    /// Check the header and length.
    pub fn parse(bytes: &'a [u8]) -> Result<Self, PlanError> {
        let version = word(bytes, 4);
        let header = match version {
            1 => 20usize,
            2 => 24,
            _ => return Err(PlanError::NotARunPlan),
        };
        if bytes.len() < header || bytes[..4] != TAG {
            return Err(PlanError::NotARunPlan);
        }
        let dof = word(bytes, 8);
        if dof == 0 || dof as usize > crate::MAX_DOF {
            return Err(PlanError::DofOutOfRange { dof });
        }
        let states = word(bytes, 12) as usize;
        let steps = word(bytes, 16);
        let inputs = if version == 2 { word(bytes, 20) } else { 0 };
        if inputs as usize > MAX_INPUTS {
            return Err(PlanError::TooManyInputs { inputs });
        }
        let state_bytes = states as u64 * 2 * dof as u64 * 4;
        let input_bytes = steps as u64 * inputs as u64 * 4;
        let expected = header as u64 + state_bytes + input_bytes;
        if bytes.len() as u64 != expected {
            return Err(PlanError::WrongLength {
                expected: expected.min(u32::MAX as u64) as u32,
                found: bytes.len() as u32,
            });
        }
        let (values, input_values) = bytes[header..].split_at(state_bytes as usize);
        Ok(Self {
            dof: dof as usize,
            states,
            steps,
            inputs: inputs as usize,
            values,
            input_values,
        })
    }

    /// Inputs per step (0 for an autonomous model).
    pub fn inputs(&self) -> usize {
        self.inputs
    }

    /// Copy the inputs held over step `k` (1-based) into `u[..inputs()]`.
    pub fn input(&self, k: u32, u: &mut [f32]) {
        let base = (k.saturating_sub(1) as usize) * self.inputs;
        for (i, slot) in u.iter_mut().enumerate().take(self.inputs) {
            *slot = f32::from_bits(word(self.input_values, 4 * (base + i)));
        }
    }

    /// Degrees of freedom of every initial state.
    pub fn dof(&self) -> usize {
        self.dof
    }

    /// Number of initial states.
    pub fn states(&self) -> usize {
        self.states
    }

    /// Steps per rollout.
    pub fn steps(&self) -> u32 {
        self.steps
    }

    /// Copy initial state `s` into `q` and `p` (each `dof()` long).
    pub fn initial_state(&self, s: usize, q: &mut [f32], p: &mut [f32]) {
        let base = s * 2 * self.dof;
        let value = |i: usize| f32::from_bits(word(self.values, 4 * (base + i)));
        for i in 0..self.dof {
            q[i] = value(i);
            p[i] = value(self.dof + i);
        }
    }
}
