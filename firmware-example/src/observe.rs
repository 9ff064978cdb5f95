//! The observer run (the harness built with the `observe` feature): the
//! runtime's `Observer` and `Monitor` over the embedded measurement sequence,
//! the same calls in the same order as `visviva observe` makes on the host
//! (trainer/src/deploy/observe.rs): a trajectory starts at its first row,
//! every later row predicts its steps (the previous row's inputs held) and
//! corrects with its measurements (none: a missed sample), then the monitor
//! records the update once the trajectory has settled. Every update is
//! logged as `o <row> [bytes]`: q, p, v = dH/dp, NIS, measurement count,
//! window NIS sum and count, energy residual and the flags, each as 4
//! little-endian bytes (f32 bit patterns, counts and flags as u32).

use visviva_runtime::monitor::{power, Envelope, FalseAlarm, Health, Monitor};
use visviva_runtime::observer::Update;
use visviva_runtime::{Channel, Hamiltonian, Measurement, Observer, ObserverError, State};

use crate::instr_clock::InstrClock;
use crate::observe_plan::{ObserverPlan, Row, MAX_INPUTS};
use crate::{faults, FirmwareModel, MAX_DOF};

/// State capacity of the observer (q and p of the largest model).
const STATE: usize = 2 * MAX_DOF;
/// Words logged per update at most: q, p, v and six health words.
const RECORD_WORDS: usize = 3 * MAX_DOF + 6;

/// The monitor at one of the window lengths the plan allows.
#[allow(clippy::large_enum_variant)]
enum AnyMonitor {
    W20(Monitor<20>),
    W50(Monitor<50>),
    W100(Monitor<100>),
    W200(Monitor<200>),
}

impl AnyMonitor {
    fn new(window: u32, alarm: FalseAlarm, threshold: f32) -> Self {
        match window {
            20 => Self::W20(Monitor::new(alarm, threshold)),
            100 => Self::W100(Monitor::new(alarm, threshold)),
            200 => Self::W200(Monitor::new(alarm, threshold)),
            _ => Self::W50(Monitor::new(alarm, threshold)),
        }
    }

    fn record(&mut self, nis: f32, count: u32, energy: f32, work: f32, inside: bool) -> Health {
        match self {
            Self::W20(m) => m.record(nis, count, energy, work, inside),
            Self::W50(m) => m.record(nis, count, energy, work, inside),
            Self::W100(m) => m.record(nis, count, energy, work, inside),
            Self::W200(m) => m.record(nis, count, energy, work, inside),
        }
    }
}

/// The observer and monitor of one trajectory.
struct Track<'m, 'a> {
    observer: Observer<'m, FirmwareModel<'a>, MAX_DOF, STATE>,
    monitor: AnyMonitor,
    /// Inputs of the current row (held over the next row's predictions).
    u: [f32; MAX_INPUTS],
    /// Inputs per row.
    m: usize,
    /// Updates of this trajectory so far.
    ticks: u32,
}

/// SysTick ticks spent in the observer, by phase.
#[derive(Default)]
struct Timing {
    predicts: u32,
    predict_ticks: u64,
    update_ticks: u64,
}

/// Log an observer failure at `row` and exit non-zero.
fn fail(row: usize, what: &str, e: ObserverError) -> ! {
    defmt::error!(
        "visviva-fw error: observer row {=u32}: {=str}: {} ({})",
        row as u32,
        what,
        e,
        defmt::Display2Format(&e)
    );
    faults::exit_failure()
}

/// Run the embedded observer plan on `model`; logs every update and the
/// timing line, and exits non-zero on a refused plan or a failed update.
pub fn run(model: &FirmwareModel<'_>, clock: &InstrClock) {
    let plan = match ObserverPlan::parse(crate::observe_plan::EMBEDDED_PLAN) {
        Ok(p) => p,
        Err(e) => {
            defmt::error!("visviva-fw error: observer plan refused: {}", e);
            faults::exit_failure()
        }
    };
    if plan.dof() != model.dof() || plan.inputs() != model.inputs() {
        defmt::error!(
            "visviva-fw error: observer plan has {=u32} dof and {=u32} inputs, model {=u32} and {=u32}",
            plan.dof() as u32,
            plan.inputs() as u32,
            model.dof() as u32,
            model.inputs() as u32
        );
        faults::exit_failure();
    }
    defmt::println!(
        "visviva-fw observer rows={=u32} window={=u32} settle={=u32} velocities={=bool}",
        plan.rows() as u32,
        plan.window(),
        plan.settle_updates(),
        plan.velocities()
    );
    let envelope = envelope(&plan);
    let mut track: Option<Track<'_, '_>> = None;
    let mut timing = Timing::default();
    for r in 0..plan.rows() {
        let row = plan.row(r);
        // A trajectory's start is set-up, not timed; each prediction is.
        match track.as_mut() {
            Some(t) if row.steps() > 0 => predict(t, row.steps(), r, clock, &mut timing),
            _ => track = Some(start(model, &plan, &row, r)),
        }
        let Some(t) = track.as_mut() else {
            faults::fail("observer: no trajectory")
        };
        row.inputs(&mut t.u);
        let t0 = clock.now();
        let (up, health) = update(model, &plan, &envelope, t, &row, r);
        let t1 = clock.now();
        timing.update_ticks += u64::from(clock.elapsed(t0, t1));
        log_estimate(model, r, t.observer.state(), &up, &health);
    }
    defmt::println!(
        "visviva-fw observer timing updates={=u32} predicts={=u32} predict_ticks={=u64} update_ticks={=u64}",
        plan.rows() as u32,
        timing.predicts,
        timing.predict_ticks,
        timing.update_ticks
    );
}

/// The envelope bounds from the plan.
fn envelope(plan: &ObserverPlan<'_>) -> Envelope<MAX_DOF> {
    let n = plan.dof();
    let mut e = Envelope {
        low: ([0.0; MAX_DOF], [0.0; MAX_DOF]),
        high: ([0.0; MAX_DOF], [0.0; MAX_DOF]),
    };
    for i in 0..n {
        (e.low.0[i], e.high.0[i]) = plan.envelope(i);
        (e.low.1[i], e.high.1[i]) = plan.envelope(n + i);
    }
    e
}

/// A trajectory's observer at its first row: measured positions with their
/// noise (an unmeasured one at its start value and spread), momenta from
/// measured velocities where the model defines p = M v, else zero.
fn start<'m, 'a>(
    model: &'m FirmwareModel<'a>,
    plan: &ObserverPlan<'_>,
    row: &Row<'_, '_>,
    r: usize,
) -> Track<'m, 'a> {
    let n = plan.dof();
    let (mut q, mut p) = ([0.0f32; MAX_DOF], [0.0f32; MAX_DOF]);
    let (mut initial, mut process) = ([0.0f32; STATE], [0.0f32; STATE]);
    for i in 0..n {
        let z = row.measured(i);
        q[i] = z.unwrap_or(plan.unmeasured_position_start(i));
        initial[i] = match z {
            Some(_) => plan.position_variance(i),
            None => plan.unmeasured_position_variance(i),
        };
        initial[n + i] = plan.initial_momentum_variance(i);
    }
    for (k, slot) in process.iter_mut().enumerate().take(2 * n) {
        *slot = plan.process_variance(k);
    }
    if plan.velocities() && (0..n).all(|i| row.measured(n + i).is_some()) {
        let mut v = [0.0f32; MAX_DOF];
        for (i, slot) in v.iter_mut().enumerate().take(n) {
            *slot = row.measured(n + i).unwrap_or(0.0);
        }
        let _ = model.momentum_from_velocity(&v[..n], &mut p[..n]);
    }
    let x0 = State::new(&q[..n], &p[..n]).unwrap_or_else(|e| fail(r, "initial state", e.into()));
    let mut observer = Observer::new(
        model,
        model.integrator(),
        x0,
        &initial[..2 * n],
        &process[..2 * n],
    )
    .unwrap_or_else(|e| fail(r, "observer", e));
    if let Some(reference) = plan.energy_reference() {
        let mut per_energy = [0.0f32; STATE];
        for (k, slot) in per_energy.iter_mut().enumerate().take(2 * n) {
            *slot = plan.process_variance_per_energy(k);
        }
        observer
            .set_energy_scaled_process(&per_energy[..2 * n], reference)
            .unwrap_or_else(|e| fail(r, "energy-scaled process noise", e));
    }
    Track {
        observer,
        monitor: AnyMonitor::new(plan.window(), plan.alarm(), plan.energy_threshold()),
        u: [0.0; MAX_INPUTS],
        m: plan.inputs(),
        ticks: 0,
    }
}

/// `steps` predictions with the last row's inputs, each timed.
fn predict(
    track: &mut Track<'_, '_>,
    steps: u32,
    r: usize,
    clock: &InstrClock,
    timing: &mut Timing,
) {
    for _ in 0..steps {
        let t0 = clock.now();
        let result = track.observer.predict(&track.u[..track.m]);
        let t1 = clock.now();
        timing.predict_ticks += u64::from(clock.elapsed(t0, t1));
        timing.predicts += 1;
        if let Err(e) = result {
            fail(r, "predict", e);
        }
    }
}

/// Correct with the row's measurements, then the energy, the power of the
/// port terms and the monitor (quiet while the trajectory settles).
fn update(
    model: &FirmwareModel<'_>,
    plan: &ObserverPlan<'_>,
    envelope: &Envelope<MAX_DOF>,
    track: &mut Track<'_, '_>,
    row: &Row<'_, '_>,
    r: usize,
) -> (Update, Health) {
    let n = plan.dof();
    let mut meas = [Measurement {
        channel: Channel::Position(0),
        value: 0.0,
        variance: 1.0,
    }; STATE];
    let mut count = 0;
    let channels = if plan.velocities() { 2 * n } else { n };
    for c in 0..channels {
        if let Some(value) = row.measured(c) {
            meas[count] = if c < n {
                Measurement {
                    channel: Channel::Position(c as u8),
                    value,
                    variance: plan.position_variance(c),
                }
            } else {
                Measurement {
                    channel: Channel::Velocity((c - n) as u8),
                    value,
                    variance: plan.velocity_variance(c - n),
                }
            };
            count += 1;
        }
    }
    let mut innov = [0.0f32; STATE];
    let up = track
        .observer
        .update(&meas[..count], &mut innov)
        .unwrap_or_else(|e| fail(r, "update", e));
    let x = *track.observer.state();
    let u = &track.u[..track.m];
    let energy = model
        .energy(&x)
        .unwrap_or_else(|e| fail(r, "energy", e.into()));
    let work =
        model.integrator().dt * power(model, &x, u).unwrap_or_else(|e| fail(r, "power", e.into()));
    track.ticks += 1;
    let inside = envelope.contains(&x);
    let health = if track.ticks > plan.settle_updates() {
        track.monitor.record(up.nis, up.count, energy, work, inside)
    } else {
        Health {
            nis_sum: up.nis,
            dof: up.count,
            nis_high: false,
            nis_low: false,
            out_of_envelope: !inside,
            energy_residual: 0.0,
            energy_flag: false,
        }
    };
    (up, health)
}

/// Log update `r` as `o <row> [bytes]`: q1..qn, p1..pn, v1..vn (dH/dp at
/// the estimate), NIS, measurement count, window NIS sum, window count,
/// energy residual and the flags (bit 0 NIS high, 1 NIS low, 2 out of the
/// envelope, 3 energy), each 4 little-endian bytes.
fn log_estimate(model: &FirmwareModel<'_>, r: usize, x: &State<MAX_DOF>, up: &Update, h: &Health) {
    let n = x.dof();
    let (mut gq, mut gp) = ([0.0f32; MAX_DOF], [0.0f32; MAX_DOF]);
    if let Err(e) = model.gradient(x, &mut gq, &mut gp) {
        fail(r, "velocity", e.into());
    }
    let flags = u32::from(h.nis_high)
        | u32::from(h.nis_low) << 1
        | u32::from(h.out_of_envelope) << 2
        | u32::from(h.energy_flag) << 3;
    let mut words = [0u32; RECORD_WORDS];
    for i in 0..n {
        words[i] = x.q[i].to_bits();
        words[n + i] = x.p[i].to_bits();
        words[2 * n + i] = gp[i].to_bits();
    }
    let health = [
        up.nis.to_bits(),
        up.count,
        h.nis_sum.to_bits(),
        h.dof,
        h.energy_residual.to_bits(),
        flags,
    ];
    words[3 * n..3 * n + 6].copy_from_slice(&health);
    let mut bytes = [0u8; 4 * RECORD_WORDS];
    let len = 3 * n + 6;
    for (chunk, w) in bytes.chunks_exact_mut(4).zip(&words[..len]) {
        chunk.copy_from_slice(&w.to_le_bytes());
    }
    defmt::println!("o {=u32} {=[u8]}", r as u32, &bytes[..4 * len]);
}
