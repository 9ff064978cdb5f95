//! The run plan: initial states and step count, chosen at build time
//! (`KEEL_RUN_PLAN` names the file). Layout, all little-endian:
//!
//! ```text
//! offset  size            field
//! 0       4               tag b"KRUN"
//! 4       4               layout version (u32, = 1)
//! 8       4               degrees of freedom n (u32)
//! 12      4               number of initial states S (u32)
//! 16      4               steps per rollout (u32)
//! 20      S * 2n * 4      initial states, each q1..qn then p1..pn, as f32
//! ```

/// The plan embedded in this build.
pub static EMBEDDED_PLAN: &[u8] = include_bytes!(env!("KEEL_RUN_PLAN"));

const TAG: [u8; 4] = *b"KRUN";
const LAYOUT_VERSION: u32 = 1;
const HEADER: usize = 20;

/// Why a plan was refused.
#[derive(Debug, Clone, Copy, defmt::Format)]
pub enum PlanError {
    /// Tag or layout version wrong.
    NotARunPlan,
    /// The degrees of freedom exceed the firmware's bound or are zero.
    DofOutOfRange { dof: u32 },
    /// The byte length disagrees with the header.
    WrongLength { expected: u32, found: u32 },
}

/// A validated plan borrowing its bytes.
pub struct RunPlan<'a> {
    dof: usize,
    states: usize,
    steps: u32,
    values: &'a [u8],
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
        if bytes.len() < HEADER || bytes[..4] != TAG || word(bytes, 4) != LAYOUT_VERSION {
            return Err(PlanError::NotARunPlan);
        }
        let dof = word(bytes, 8);
        if dof == 0 || dof as usize > crate::MAX_DOF {
            return Err(PlanError::DofOutOfRange { dof });
        }
        let states = word(bytes, 12) as usize;
        let steps = word(bytes, 16);
        let expected = HEADER as u64 + states as u64 * 2 * dof as u64 * 4;
        if bytes.len() as u64 != expected {
            return Err(PlanError::WrongLength {
                expected: expected.min(u32::MAX as u64) as u32,
                found: bytes.len() as u32,
            });
        }
        Ok(Self {
            dof: dof as usize,
            states,
            steps,
            values: &bytes[HEADER..],
        })
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
