//! `visviva observe`: run the runtime's state observer and health monitor
//! over a measurement log and write the estimates, innovations, NIS and
//! flags as CSV (streamed, written atomically).

use std::path::PathBuf;

use anyhow::{anyhow, Result};

use crate::deploy::blob::HostModel;
use crate::deploy::observe::observe_csv;
use crate::deploy::observer_settings::{companion_path, ObserverSettings};

/// Arguments of `visviva observe`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The blob whose model the observer steps.
    #[arg(long)]
    pub model: PathBuf,
    /// Measurement log: traj,t,q1..qn, optionally v1..vn, inputs u1..um for
    /// a driven model (an empty q or v field is a missed sample).
    #[arg(long)]
    pub data: PathBuf,
    /// Output CSV of estimates and flags.
    #[arg(long)]
    pub out: PathBuf,
    /// Observer settings (default: M.observer.toml beside the blob, written
    /// by `visviva tune-observer`).
    #[arg(long, value_name = "FILE.toml")]
    pub settings: Option<PathBuf>,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let mut inputs = vec![
        ("--model", args.model.as_path()),
        ("--data", args.data.as_path()),
    ];
    inputs.extend(args.settings.as_deref().map(|p| ("--settings", p)));
    crate::outputs::check_outputs(&inputs, &[("--out", args.out.as_path())])?;
    let bytes = std::fs::read(&args.model)
        .map_err(|e| anyhow!("{}: cannot read: {e}", args.model.display()))?;
    let model =
        HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let path = args
        .settings
        .clone()
        .unwrap_or_else(|| companion_path(&args.model));
    if !path.exists() {
        anyhow::bail!(
            "{}: no observer settings (write them with `visviva tune-observer --model {} --train LOG.csv`, or pass --settings)",
            path.display(),
            args.model.display()
        );
    }
    let settings = ObserverSettings::read(&path, model.dof())?;
    let s = observe_csv(&model, &settings, &args.data, &args.out)?;
    eprintln!(
        "wrote {} ({} rows, {} trajectories); NIS window ({} updates, false-alarm rate {}): {} of {} full windows above the bound, {} below; {} rows out of the envelope (bounds: {})",
        args.out.display(),
        s.rows,
        s.trajectories,
        settings.window,
        settings.false_alarm,
        s.nis_high,
        s.full_windows,
        s.nis_low,
        s.out_of_envelope,
        s.envelope_source
            .map_or("none", crate::deploy::observe::EnvelopeSource::describe)
    );
    eprintln!("{}", crate::CAUTION);
    Ok(())
}
