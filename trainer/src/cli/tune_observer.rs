//! `visviva tune-observer`: observer settings for a blob from its training
//! and validation logs (measurement noise from the logs' noise estimate,
//! process noise shaped by the model's one-step prediction residuals,
//! growing with the energy, scaled so the NIS window test keeps its
//! false-alarm rate on those logs).

use std::path::PathBuf;

use anyhow::{anyhow, Result};

use crate::data::log::LoadOptions;
use crate::deploy::blob::HostModel;
use crate::deploy::model_log;
use crate::deploy::observer_settings::{companion_path, parse_false_alarm, WINDOWS};
use crate::deploy::observer_tuning::tune;

/// Arguments of `visviva tune-observer`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The blob.
    #[arg(long)]
    pub model: PathBuf,
    /// Training log (q and p columns, as `visviva fit` takes).
    #[arg(long, alias = "data")]
    pub train: PathBuf,
    /// Validation log (optional).
    #[arg(long, alias = "val")]
    pub validation: Option<PathBuf>,
    /// NIS window length in updates: 20, 50, 100 or 200.
    #[arg(long, default_value_t = 50)]
    pub window: usize,
    /// Two-sided false-alarm rate of the NIS test: 10%, 5%, 1% or 0.2%.
    #[arg(long, default_value = "1%")]
    pub false_alarm: String,
    /// Output settings (default: M.observer.toml beside the blob).
    #[arg(long, value_name = "FILE.toml")]
    pub out: Option<PathBuf>,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let bytes = std::fs::read(&args.model)
        .map_err(|e| anyhow!("{}: cannot read: {e}", args.model.display()))?;
    let model =
        HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let alarm = parse_false_alarm(&args.false_alarm).map_err(|e| anyhow!("--false-alarm: {e}"))?;
    if !WINDOWS.contains(&args.window) {
        anyhow::bail!("--window {}: expected one of {WINDOWS:?}", args.window);
    }
    let out = args
        .out
        .clone()
        .unwrap_or_else(|| companion_path(&args.model));
    let mut inputs = vec![
        ("--model", args.model.as_path()),
        ("--train", args.train.as_path()),
    ];
    inputs.extend(args.validation.as_deref().map(|p| ("--validation", p)));
    crate::outputs::check_outputs(&inputs, &[("--out", out.as_path())])?;
    let opts = LoadOptions::default();
    let mut logs = Vec::new();
    for path in std::iter::once(&args.train).chain(args.validation.as_ref()) {
        let (log, converted) = model_log::load(path, &model, &opts)?;
        if converted {
            eprintln!("{}: {}", path.display(), model_log::CONVERTED);
        }
        logs.push(log);
    }
    let refs: Vec<_> = logs.iter().collect();
    let t = tune(&model, &refs, alarm, args.window)?;
    t.settings.write(&out)?;
    eprintln!(
        "wrote {}: position noise {:?}, process noise on the residuals' shape at level ({:.3e} + {:.3e} per unit of energy above the lowest) x {}; on the tuning logs {} of {} full windows above the bound, {} below",
        out.display(),
        t.settings.position_noise,
        t.level_line.0,
        t.level_line.1,
        t.scale,
        t.tuning_summary.nis_high,
        t.tuning_summary.full_windows,
        t.tuning_summary.nis_low
    );
    Ok(())
}
