//! The runtime's observer and health monitor over a measurement log, row by
//! row: each trajectory starts from its first row (positions measured,
//! momenta from measured velocities where the model defines p = M v, else
//! zero with the settings' spread), then every later row predicts as many
//! model steps as its time gap holds (inputs of the previous row held) and
//! corrects with the row's measurements; a missed sample only predicts.
//! The first `settle_updates` updates of a trajectory are kept out of the
//! monitor while the filter settles from its initial spread. The process
//! noise grows with the estimate's energy when the settings say so. The
//! out-of-envelope flag uses the blob's training envelope when the blob
//! carries one, else the settings file's envelope ([`EnvelopeSource`]).
//! [`observe_csv`] streams a log to the estimate CSV (atomic write).

use std::io::Write;
use std::path::Path;

use anyhow::{anyhow, bail, Result};
use visviva_runtime::monitor::{power, Envelope, FalseAlarm, Health, Monitor};
use visviva_runtime::{Channel, Hamiltonian, Measurement, Observer, State};

use crate::atomic::write_atomic_with;
use crate::data::measure_log::{MeasurementReader, MeasurementRow};
use crate::deploy::blob::{HostModel, HOST_MAX_DOF};
use crate::deploy::observer_settings::ObserverSettings;

/// The host observer's state capacity (q and p of the largest model).
pub const HOST_STATE: usize = 2 * HOST_MAX_DOF;

/// Most model steps between two rows (a larger gap is refused).
pub const MAX_STEPS_PER_ROW: usize = 100_000;

/// The NIS monitor at one of the supported window lengths (one per
/// trajectory, held inline: the size difference is a few kilobytes).
#[derive(Debug, Clone)]
#[allow(clippy::large_enum_variant)]
enum AnyMonitor {
    W20(Monitor<20>),
    W50(Monitor<50>),
    W100(Monitor<100>),
    W200(Monitor<200>),
}

impl AnyMonitor {
    fn new(window: usize, alarm: FalseAlarm, threshold: f32) -> Self {
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

/// One row's estimate and flags.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    /// Estimated positions.
    pub q: Vec<f32>,
    /// Estimated momenta.
    pub p: Vec<f32>,
    /// Velocities dH/dp at the estimate.
    pub v: Vec<f32>,
    /// Innovation of each measured channel, positions then velocities
    /// (`None`: not measured at this row).
    pub innovations: Vec<Option<f32>>,
    /// The update's NIS (0 without measurements).
    pub nis: f32,
    /// Scalar measurements in the update.
    pub count: u32,
    /// The monitor's flags.
    pub health: Health,
    /// Whether the monitor's window holds `window` ticks of this trajectory.
    pub window_full: bool,
}

/// The observer and monitor of one trajectory.
struct Track<'m, 'b> {
    id: String,
    t: f64,
    u: Vec<f32>,
    observer: Observer<'m, HostModel<'b>, HOST_MAX_DOF, HOST_STATE>,
    monitor: AnyMonitor,
    ticks: usize,
}

/// Where the out-of-envelope flag's bounds come from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EnvelopeSource {
    /// The blob's training envelope (format version 4).
    Blob,
    /// The observer settings' `envelope_low` / `envelope_high` (the blob
    /// carries none).
    Settings,
}

impl EnvelopeSource {
    /// The words `visviva observe` prints.
    pub fn describe(self) -> &'static str {
        match self {
            Self::Blob => "the blob's training envelope (training range widened by a tenth on each side)",
            Self::Settings => "the settings file's envelope_low/envelope_high (the blob carries no training envelope)",
        }
    }
}

/// The observer over a stream of rows.
pub struct ObserverRun<'m, 'b> {
    model: &'m HostModel<'b>,
    settings: ObserverSettings,
    envelope: Envelope<HOST_MAX_DOF>,
    envelope_source: EnvelopeSource,
    track: Option<Track<'m, 'b>>,
}

fn f32s(v: &[f64]) -> Vec<f32> {
    v.iter().map(|x| *x as f32).collect()
}

impl<'m, 'b> ObserverRun<'m, 'b> {
    /// A run of `model` with `settings` (validated against the model).
    pub fn new(model: &'m HostModel<'b>, settings: ObserverSettings) -> Result<Self> {
        let n = model.dof();
        settings.validate(n)?;
        let mut fallback = Envelope {
            low: ([0.0; HOST_MAX_DOF], [0.0; HOST_MAX_DOF]),
            high: ([0.0; HOST_MAX_DOF], [0.0; HOST_MAX_DOF]),
        };
        for i in 0..n {
            fallback.low.0[i] = settings.envelope_low[i] as f32;
            fallback.low.1[i] = settings.envelope_low[n + i] as f32;
            fallback.high.0[i] = settings.envelope_high[i] as f32;
            fallback.high.1[i] = settings.envelope_high[n + i] as f32;
        }
        let envelope_source = match model.envelope() {
            Some(_) => EnvelopeSource::Blob,
            None => EnvelopeSource::Settings,
        };
        Ok(Self {
            model,
            settings,
            envelope: Envelope::of_model_or(model, fallback),
            envelope_source,
            track: None,
        })
    }

    /// Where the out-of-envelope flag's bounds come from.
    pub fn envelope_source(&self) -> EnvelopeSource {
        self.envelope_source
    }

    /// The measurements of `row` with their noise variances.
    fn measurements(&self, row: &MeasurementRow) -> Vec<Measurement> {
        let s = &self.settings;
        let q = row.q.iter().enumerate().filter_map(|(i, z)| {
            z.map(|z| Measurement {
                channel: Channel::Position(i as u8),
                value: z as f32,
                variance: (s.position_noise[i] * s.position_noise[i]) as f32,
            })
        });
        let v = row.v.iter().enumerate().filter_map(|(i, z)| {
            z.map(|z| Measurement {
                channel: Channel::Velocity(i as u8),
                value: z as f32,
                variance: (s.velocity_noise[i] * s.velocity_noise[i]) as f32,
            })
        });
        q.chain(v).collect()
    }

    /// A new trajectory's observer at its first row.
    fn start(&self, row: &MeasurementRow) -> Result<Track<'m, 'b>> {
        let (n, s) = (self.model.dof(), &self.settings);
        let mut q = vec![0.0f32; n];
        let mut initial = vec![0.0f32; 2 * n];
        for i in 0..n {
            let range = s.envelope_high[i] - s.envelope_low[i];
            q[i] = row.q[i].unwrap_or(0.5 * (s.envelope_low[i] + s.envelope_high[i])) as f32;
            let sd = if row.q[i].is_some() {
                s.position_noise[i]
            } else {
                range.max(1e-30)
            };
            initial[i] = (sd * sd) as f32;
            initial[n + i] = (s.initial_momentum_std[i] * s.initial_momentum_std[i]) as f32;
        }
        let mut p = vec![0.0f32; n];
        if row.v.len() == n && row.v.iter().all(Option::is_some) {
            let v: Vec<f32> = row.v.iter().map(|v| v.unwrap_or(0.0) as f32).collect();
            let _ = self.model.momentum_from_velocity(&v, &mut p);
        }
        let x0 = State::new(&q, &p).map_err(|e| anyhow!("initial state: {e}"))?;
        let mut observer = Observer::new(
            self.model,
            self.model.integrator(),
            x0,
            &initial,
            &f32s(&s.process_variance),
        )
        .map_err(|e| anyhow!("observer: {e}"))?;
        if let (Some(slope), Some(reference)) = (&s.process_variance_per_energy, s.energy_reference)
        {
            observer
                .set_energy_scaled_process(&f32s(slope), reference as f32)
                .map_err(|e| anyhow!("observer: {e}"))?;
        }
        Ok(Track {
            id: row.traj.clone(),
            t: row.t,
            u: f32s(&row.u),
            observer,
            monitor: AnyMonitor::new(
                s.window,
                s.alarm(),
                s.energy_threshold.map_or(f32::INFINITY, |t| t as f32),
            ),
            ticks: 0,
        })
    }

    /// Model steps between the track's last row and `t`.
    fn steps_to(&self, last: f64, t: f64) -> Result<usize> {
        let dt = self.model.integrator().dt as f64;
        let k = ((t - last) / dt).round();
        if !(k >= 1.0 && ((t - last) - k * dt).abs() <= 0.01 * dt) {
            bail!(
                "column 't': time {t} is not a whole number of model steps (dt = {dt} s) after the previous row's {last}"
            );
        }
        if k > MAX_STEPS_PER_ROW as f64 {
            bail!(
                "column 't': {k} model steps since the previous row (at most {MAX_STEPS_PER_ROW})"
            );
        }
        Ok(k as usize)
    }

    /// Process one row: start a trajectory or predict to the row's time,
    /// then correct with its measurements and record the flags. Errors
    /// carry no location; the caller adds file and line.
    pub fn push(&mut self, row: &MeasurementRow) -> Result<Estimate> {
        let fresh = self.track.as_ref().is_none_or(|t| t.id != row.traj);
        if fresh {
            self.track = Some(self.start(row)?);
        } else if let Some(last) = self.track.as_ref().map(|t| t.t) {
            let steps = self.steps_to(last, row.t)?;
            let track = self
                .track
                .as_mut()
                .ok_or_else(|| anyhow!("no trajectory"))?;
            for _ in 0..steps {
                track
                    .observer
                    .predict(&track.u)
                    .map_err(|e| anyhow!("observer: {e}"))?;
            }
        }
        let meas = self.measurements(row);
        let (model, envelope) = (self.model, self.envelope);
        let track = self
            .track
            .as_mut()
            .ok_or_else(|| anyhow!("no trajectory"))?;
        track.t = row.t;
        track.u = f32s(&row.u);
        let mut innov = vec![0.0f32; meas.len()];
        let up = track
            .observer
            .update(&meas, &mut innov)
            .map_err(|e| anyhow!("observer: {e}"))?;
        let x = *track.observer.state();
        let energy = model.energy(&x).map_err(|e| anyhow!("energy: {e}"))?;
        let work =
            model.integrator().dt * power(model, &x, &track.u).map_err(|e| anyhow!("{e}"))?;
        track.ticks += 1;
        let settled = track.ticks > self.settings.settle_updates;
        let inside = envelope.contains(&x);
        let health = if settled {
            track.monitor.record(up.nis, up.count, energy, work, inside)
        } else {
            quiet(up.nis, up.count, inside)
        };
        Ok(Estimate {
            q: x.q().to_vec(),
            p: x.p().to_vec(),
            v: velocities(model, &x)?,
            innovations: place_innovations(row, &meas, &innov),
            nis: up.nis,
            count: up.count,
            health,
            window_full: track.ticks >= self.settings.settle_updates + self.settings.window,
        })
    }
}

/// The flags while the filter settles: no window test yet.
fn quiet(nis: f32, count: u32, inside: bool) -> Health {
    Health {
        nis_sum: nis,
        dof: count,
        nis_high: false,
        nis_low: false,
        out_of_envelope: !inside,
        energy_residual: 0.0,
        energy_flag: false,
    }
}

/// dH/dp at `x`.
fn velocities(model: &HostModel<'_>, x: &State<HOST_MAX_DOF>) -> Result<Vec<f32>> {
    let (mut gq, mut gp) = ([0.0f32; HOST_MAX_DOF], [0.0f32; HOST_MAX_DOF]);
    model
        .gradient(x, &mut gq, &mut gp)
        .map_err(|e| anyhow!("gradient: {e}"))?;
    Ok(gp[..x.dof()].to_vec())
}

/// Innovations in column order (positions, then velocities if the log has
/// them), `None` where a channel was not measured.
fn place_innovations(
    row: &MeasurementRow,
    meas: &[Measurement],
    innov: &[f32],
) -> Vec<Option<f32>> {
    let n = row.q.len();
    let mut out = vec![None; n + row.v.len()];
    for (m, z) in meas.iter().zip(innov) {
        let slot = match m.channel {
            Channel::Position(i) => i as usize,
            Channel::Velocity(i) => n + i as usize,
        };
        if let Some(o) = out.get_mut(slot) {
            *o = Some(*z);
        }
    }
    out
}

/// Counts over a whole log.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ObserveSummary {
    /// Rows processed.
    pub rows: usize,
    /// Trajectories.
    pub trajectories: usize,
    /// Rows whose NIS window was full.
    pub full_windows: usize,
    /// Rows flagged NIS high.
    pub nis_high: usize,
    /// Rows flagged NIS low.
    pub nis_low: usize,
    /// Rows out of the envelope.
    pub out_of_envelope: usize,
    /// Rows with the energy flag.
    pub energy_flags: usize,
    /// Where the envelope's bounds came from (`None` before any run).
    pub envelope_source: Option<EnvelopeSource>,
}

impl ObserveSummary {
    fn add(&mut self, e: &Estimate, fresh: bool) {
        self.rows += 1;
        self.trajectories += usize::from(fresh);
        let h = &e.health;
        self.full_windows += usize::from(e.window_full);
        self.nis_high += usize::from(h.nis_high);
        self.nis_low += usize::from(h.nis_low);
        self.out_of_envelope += usize::from(h.out_of_envelope);
        self.energy_flags += usize::from(h.energy_flag);
    }
}

/// The estimate CSV header for `n` coordinates, with velocity innovations
/// when the log has velocities.
pub fn header(n: usize, velocities: bool) -> Vec<String> {
    let mut h = vec!["traj".to_string(), "t".to_string()];
    for prefix in ["q", "p", "v", "innov_q"] {
        h.extend((1..=n).map(|k| format!("{prefix}{k}")));
    }
    if velocities {
        h.extend((1..=n).map(|k| format!("innov_v{k}")));
    }
    for name in [
        "nis",
        "measurements",
        "nis_window",
        "window_measurements",
        "nis_high",
        "nis_low",
        "out_of_envelope",
        "energy_residual",
        "energy_flag",
    ] {
        h.push(name.to_string());
    }
    h
}

/// One estimate as CSV fields.
fn record(row: &MeasurementRow, e: &Estimate) -> Vec<String> {
    let mut r = vec![row.traj.clone(), format!("{}", row.t)];
    for list in [&e.q, &e.p, &e.v] {
        r.extend(list.iter().map(|v| format!("{v}")));
    }
    r.extend(
        e.innovations
            .iter()
            .map(|v| v.map_or(String::new(), |v| format!("{v}"))),
    );
    let h = &e.health;
    let flag = |b: bool| if b { "1" } else { "0" }.to_string();
    r.extend([
        format!("{}", e.nis),
        format!("{}", e.count),
        format!("{}", h.nis_sum),
        format!("{}", h.dof),
        flag(h.nis_high),
        flag(h.nis_low),
        flag(h.out_of_envelope),
        format!("{}", h.energy_residual),
        flag(h.energy_flag),
    ]);
    r
}

/// Run the observer over the log `data` and stream the estimates to `out`
/// (atomically: on any error nothing is written). Errors name the file,
/// line and column.
pub fn observe_csv(
    model: &HostModel<'_>,
    settings: &ObserverSettings,
    data: &Path,
    out: &Path,
) -> Result<ObserveSummary> {
    let n = model.dof();
    let mut reader = MeasurementReader::open(data, n, model.inputs())?;
    let mut run = ObserverRun::new(model, settings.clone())?;
    let mut summary = ObserveSummary {
        envelope_source: Some(run.envelope_source()),
        ..ObserveSummary::default()
    };
    write_atomic_with(out, |w: &mut dyn Write| {
        let mut writer = csv::Writer::from_writer(w);
        writer.write_record(header(n, reader.has_velocities()))?;
        let mut last: Option<String> = None;
        while let Some(row) = reader.next_row()? {
            let e = run
                .push(&row)
                .map_err(|e| anyhow!("{}: line {}: {e:#}", data.display(), row.line))?;
            let fresh = last.as_deref() != Some(row.traj.as_str());
            summary.add(&e, fresh);
            last = Some(row.traj.clone());
            writer.write_record(record(&row, &e))?;
        }
        if summary.rows == 0 {
            bail!("{}: line 2: the log has no data rows", data.display());
        }
        writer.flush()?;
        Ok(())
    })?;
    Ok(summary)
}
