//! `visviva rollout`: step a blob on the host through `visviva-runtime` — the
//! device's arithmetic — and write the trajectory as CSV, optionally as exact
//! f32 bit patterns for bit-for-bit comparison with a board.

use std::path::PathBuf;

use anyhow::{anyhow, bail, Result};

use crate::atomic::write_atomic;
use crate::cli::shared_args::IntegratorArgs;
use crate::deploy::blob::HostModel;
use crate::deploy::rollout::{parse_init, read_inputs, roll_driven, to_csv};

/// Arguments of `visviva rollout`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The blob to step.
    #[arg(long, value_name = "MODEL.vvb")]
    pub model: PathBuf,
    /// Initial state, every coordinate named once: "q1=0.5,p1=0".
    #[arg(long, value_name = "q1=X,..,p1=Y,..")]
    pub init: String,
    /// Number of steps.
    #[arg(long, value_name = "N")]
    pub steps: usize,
    /// Input sequence for a driven model: CSV `t,u1..um`, row k held over
    /// step k (at least STEPS rows).
    #[arg(long, value_name = "FILE.csv")]
    pub inputs: Option<PathBuf>,
    #[command(flatten)]
    pub integrator: IntegratorArgs,
    /// Write state values as exact bit patterns (0x3f800000) instead of
    /// shortest round-trip decimals (both are exact).
    #[arg(long)]
    pub bits: bool,
    /// Output CSV (default: standard output); times t = k dt are written
    /// with the step's precision.
    #[arg(long, value_name = "FILE.csv")]
    pub out: Option<PathBuf>,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let bytes = std::fs::read(&args.model)
        .map_err(|e| anyhow!("{}: cannot read: {e}", args.model.display()))?;
    let model =
        HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let model = model
        .with_integrator(args.integrator.overrides().apply(model.integrator()))
        .map_err(|e| anyhow!("{e}"))?;
    let dof = visviva_runtime::Hamiltonian::dof(&model);
    let x0 = parse_init(&args.init, dof)?;
    let m = visviva_runtime::Hamiltonian::inputs(&model);
    let inputs = match &args.inputs {
        Some(p) => {
            let rows = read_inputs(p, m)?;
            if rows.len() < args.steps {
                bail!(
                    "{}: {} input rows for {} steps",
                    p.display(),
                    rows.len(),
                    args.steps
                );
            }
            rows
        }
        None if m > 0 => {
            bail!("the model takes {m} inputs: pass --inputs FILE.csv (columns t,u1..u{m})")
        }
        None => Vec::new(),
    };
    let r = roll_driven(&model, &x0, args.steps, &inputs)?;
    if let Some((k, e)) = r.failure {
        bail!("step {} of {}: {e}; nothing written", k + 1, args.steps);
    }
    let csv = to_csv(&r.states, dof, model.integrator().dt, args.bits);
    match &args.out {
        Some(p) => {
            write_atomic(p, csv.as_bytes())?;
            eprintln!("wrote {} ({} states)", p.display(), r.states.len());
        }
        None => print!("{csv}"),
    }
    eprintln!("{}", crate::CAUTION);
    Ok(())
}
