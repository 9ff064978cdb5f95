//! The observer plan: the observer settings, resolved to the `f32` values
//! `visviva observe` computes from `M.observer.toml`, and a recorded
//! measurement sequence, chosen at build time (`VISVIVA_OBSERVER_PLAN` names
//! the file; `cargo xtask device` writes it). Layout, all little-endian,
//! every value 4 bytes (u32, or f32 where marked):
//!
//! ```text
//! offset  words     field
//! 0       1         tag b"VOBS"
//! 4       1         layout version (2)
//! 8       1         degrees of freedom n
//! 12      1         inputs per row m
//! 16      1         1 when the log has velocity columns v1..vn, else 0
//! 20      1         NIS window in updates (20, 50, 100 or 200)
//! 24      1         false-alarm rate: 0 = 10 %, 1 = 5 %, 2 = 1 %, 3 = 0.2 %
//! 28      1         updates kept out of the monitor at a trajectory's start
//! 32      1         energy threshold (f32; +inf: the flag is never raised)
//! 36      1         energy reference H_ref of the energy-scaled process
//!                   noise (f32; NaN: the process noise is constant)
//! 40      1         rows R
//! 44      13 n      f32 constants: position variance (n), velocity
//!                   variance (n), process variance per step (2n, q then
//!                   p), initial momentum variance (n), initial variance of
//!                   an unmeasured position (n), start of an unmeasured
//!                   position (n), envelope low (2n), envelope high (2n),
//!                   process variance per step and unit of energy above
//!                   H_ref (2n, q then p; read only when H_ref is a number)
//! ...     R rows    each: steps since the previous row (0: the row starts a
//!                   trajectory), presence mask (bit i: q_(i+1) measured,
//!                   bit n+i: v_(i+1) measured), measured values q1..qn
//!                   (then v1..vn with velocity columns; f32, ignored where
//!                   absent), inputs u1..um (f32, held over the next row's
//!                   predictions)
//! ```

use visviva_runtime::monitor::FalseAlarm;

/// The plan embedded in this build.
pub static EMBEDDED_PLAN: &[u8] = include_bytes!(env!(
    "VISVIVA_OBSERVER_PLAN",
    "set VISVIVA_OBSERVER_PLAN to an observer plan file to build the observer harness (`cargo xtask device` does)"
));

const TAG: [u8; 4] = *b"VOBS";
const HEADER_WORDS: usize = 11;
/// Constant words per degree of freedom.
const CONSTANT_WORDS: usize = 13;
/// Inputs per row the firmware can hold.
pub const MAX_INPUTS: usize = visviva_runtime::MAX_INPUTS;
/// Most steps between two rows (as `visviva observe`).
pub const MAX_STEPS_PER_ROW: u32 = 100_000;

/// Why a plan was refused.
#[derive(Debug, Clone, Copy, defmt::Format)]
pub enum PlanError {
    /// Tag or layout version wrong.
    NotAnObserverPlan,
    /// The degrees of freedom exceed the firmware's bound or are zero.
    DofOutOfRange { dof: u32 },
    /// More inputs than the firmware holds.
    TooManyInputs { inputs: u32 },
    /// A window, false-alarm code or flag outside its set.
    BadSetting { offset: u32 },
    /// The byte length disagrees with the header.
    WrongLength { expected: u32, found: u32 },
    /// Row `row` steps more than [`MAX_STEPS_PER_ROW`] or starts with a
    /// trajectory-continuing row.
    BadRow { row: u32 },
}

/// A validated plan borrowing its bytes.
pub struct ObserverPlan<'a> {
    dof: usize,
    inputs: usize,
    velocities: bool,
    window: u32,
    alarm: FalseAlarm,
    settle: u32,
    energy_threshold: f32,
    energy_reference: f32,
    rows: usize,
    constants: &'a [u8],
    row_bytes: &'a [u8],
}

/// One row of the sequence.
pub struct Row<'p, 'a> {
    plan: &'p ObserverPlan<'a>,
    base: usize,
}

fn word(bytes: &[u8], at: usize) -> u32 {
    match bytes.get(at..at + 4) {
        Some(&[a, b, c, d]) => u32::from_le_bytes([a, b, c, d]),
        _ => 0,
    }
}

fn real(bytes: &[u8], at: usize) -> f32 {
    f32::from_bits(word(bytes, at))
}

fn alarm_from_code(code: u32) -> Option<FalseAlarm> {
    Some(match code {
        0 => FalseAlarm::TenPercent,
        1 => FalseAlarm::FivePercent,
        2 => FalseAlarm::OnePercent,
        3 => FalseAlarm::PointTwoPercent,
        _ => return None,
    })
}

impl<'a> ObserverPlan<'a> {
    /// Check the header, the settings' sets, the length and every row's
    /// step count.
    pub fn parse(bytes: &'a [u8]) -> Result<Self, PlanError> {
        let header = 4 * HEADER_WORDS;
        if bytes.len() < header || bytes[..4] != TAG || word(bytes, 4) != 2 {
            return Err(PlanError::NotAnObserverPlan);
        }
        let dof = word(bytes, 8);
        if dof == 0 || dof as usize > crate::MAX_DOF {
            return Err(PlanError::DofOutOfRange { dof });
        }
        let inputs = word(bytes, 12);
        if inputs as usize > MAX_INPUTS {
            return Err(PlanError::TooManyInputs { inputs });
        }
        let velocities = match word(bytes, 16) {
            0 => false,
            1 => true,
            _ => return Err(PlanError::BadSetting { offset: 16 }),
        };
        let window = word(bytes, 20);
        if ![20, 50, 100, 200].contains(&window) {
            return Err(PlanError::BadSetting { offset: 20 });
        }
        let alarm = alarm_from_code(word(bytes, 24)).ok_or(PlanError::BadSetting { offset: 24 })?;
        let (n, m) = (dof as u64, inputs as u64);
        let rows = word(bytes, 40) as u64;
        let channels = if velocities { 2 * n } else { n };
        let constant_bytes = CONSTANT_WORDS as u64 * n * 4;
        let row_bytes = rows * (2 + channels + m) * 4;
        let expected = header as u64 + constant_bytes + row_bytes;
        if bytes.len() as u64 != expected {
            return Err(PlanError::WrongLength {
                expected: expected.min(u32::MAX as u64) as u32,
                found: bytes.len() as u32,
            });
        }
        let (constants, row_bytes) = bytes[header..].split_at(constant_bytes as usize);
        let plan = Self {
            dof: dof as usize,
            inputs: inputs as usize,
            velocities,
            window,
            alarm,
            settle: word(bytes, 28),
            energy_threshold: real(bytes, 32),
            energy_reference: real(bytes, 36),
            rows: rows as usize,
            constants,
            row_bytes,
        };
        for r in 0..plan.rows {
            let row = plan.row(r);
            let steps = row.steps();
            let stray = row.mask() >> channels as u32 != 0;
            if stray || steps > MAX_STEPS_PER_ROW || (r == 0 && steps != 0) {
                return Err(PlanError::BadRow { row: r as u32 });
            }
        }
        Ok(plan)
    }

    /// Degrees of freedom.
    pub fn dof(&self) -> usize {
        self.dof
    }

    /// Inputs per row.
    pub fn inputs(&self) -> usize {
        self.inputs
    }

    /// Whether the rows carry velocity columns.
    pub fn velocities(&self) -> bool {
        self.velocities
    }

    /// NIS window length (20, 50, 100 or 200).
    pub fn window(&self) -> u32 {
        self.window
    }

    /// False-alarm rate of the window test.
    pub fn alarm(&self) -> FalseAlarm {
        self.alarm
    }

    /// Updates kept out of the monitor at a trajectory's start.
    pub fn settle_updates(&self) -> u32 {
        self.settle
    }

    /// Threshold of the energy-balance residual.
    pub fn energy_threshold(&self) -> f32 {
        self.energy_threshold
    }

    /// The energy-scaled process noise's reference energy, when the
    /// process noise grows with the energy.
    pub fn energy_reference(&self) -> Option<f32> {
        (!self.energy_reference.is_nan()).then_some(self.energy_reference)
    }

    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// Constant `k` of block `block` (0: position variance, 1: velocity
    /// variance, 2: process variance (2n), 4: initial momentum variance,
    /// 5: unmeasured position variance, 6: unmeasured position start, 7:
    /// envelope low (2n), 9: envelope high (2n), 11: process variance per
    /// unit of energy (2n)), in units of n words.
    fn constant(&self, block: usize, k: usize) -> f32 {
        real(self.constants, 4 * (block * self.dof + k))
    }

    /// Measurement variance of q_(i+1).
    pub fn position_variance(&self, i: usize) -> f32 {
        self.constant(0, i)
    }

    /// Measurement variance of v_(i+1).
    pub fn velocity_variance(&self, i: usize) -> f32 {
        self.constant(1, i)
    }

    /// Process variance per step of state coordinate k (q then p).
    pub fn process_variance(&self, k: usize) -> f32 {
        self.constant(2, k)
    }

    /// Process variance per step and unit of energy above the reference,
    /// of state coordinate k (q then p).
    pub fn process_variance_per_energy(&self, k: usize) -> f32 {
        self.constant(11, k)
    }

    /// Initial variance of p_(i+1).
    pub fn initial_momentum_variance(&self, i: usize) -> f32 {
        self.constant(4, i)
    }

    /// Initial variance of q_(i+1) when the first row does not measure it.
    pub fn unmeasured_position_variance(&self, i: usize) -> f32 {
        self.constant(5, i)
    }

    /// Start of q_(i+1) when the first row does not measure it.
    pub fn unmeasured_position_start(&self, i: usize) -> f32 {
        self.constant(6, i)
    }

    /// Envelope bound of state coordinate k (q then p).
    pub fn envelope(&self, k: usize) -> (f32, f32) {
        (self.constant(7, k), self.constant(9, k))
    }

    /// Row `r` (0-based).
    pub fn row(&self, r: usize) -> Row<'_, 'a> {
        let channels = if self.velocities { 2 } else { 1 } * self.dof;
        Row {
            plan: self,
            base: 4 * r * (2 + channels + self.inputs),
        }
    }
}

impl Row<'_, '_> {
    /// Model steps since the previous row (0: the row starts a trajectory).
    pub fn steps(&self) -> u32 {
        word(self.plan.row_bytes, self.base)
    }

    /// Presence mask: bit c set when channel c is measured.
    fn mask(&self) -> u32 {
        word(self.plan.row_bytes, self.base + 4)
    }

    /// The measured value of channel `c` (q_(c+1) for c < n, else
    /// v_(c-n+1)), or None when the row misses it.
    pub fn measured(&self, c: usize) -> Option<f32> {
        (c < 32 && self.mask() & (1 << c) != 0)
            .then(|| real(self.plan.row_bytes, self.base + 8 + 4 * c))
    }

    /// Copy the row's inputs into `u[..inputs()]`.
    pub fn inputs(&self, u: &mut [f32]) {
        let channels = if self.plan.velocities { 2 } else { 1 } * self.plan.dof;
        let at = self.base + 8 + 4 * channels;
        for (i, slot) in u.iter_mut().enumerate().take(self.plan.inputs) {
            *slot = real(self.plan.row_bytes, at + 4 * i);
        }
    }
}
