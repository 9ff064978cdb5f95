//! `visviva export`: turn a fitted model into a device blob — choose the weight
//! storage (f32 or int8) and the integrator — and measure what that costs in
//! bytes and in accuracy before anything is flashed.

use std::path::PathBuf;

use anyhow::{bail, Result};

use crate::atomic::write_atomic;
use crate::capacity::check_memory;
use crate::cli::shared_args::IntegratorArgs;
use crate::deploy::blob::{BlobModel, WeightKind};
use crate::deploy::convergence::TrainingRange;
use crate::deploy::export::{export, ExportCheck};

/// Arguments of `visviva export`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The fitted model (a blob written by `visviva fit`).
    #[arg(long, value_name = "MODEL.vvb")]
    pub model: PathBuf,
    /// Weight storage on the device.
    #[arg(long, value_enum, default_value = "f32")]
    pub weights: WeightKind,
    #[command(flatten)]
    pub integrator: IntegratorArgs,
    /// Steps of the rollouts that measure the accuracy price (any number:
    /// they stream).
    #[arg(long, default_value_t = 10_000, value_name = "N")]
    pub check_steps: usize,
    /// Number of initial states for those rollouts.
    #[arg(long, default_value_t = 8, value_name = "N")]
    pub check_states: usize,
    /// Write the measurements as JSON to this file.
    #[arg(long, value_name = "FILE.json")]
    pub json: Option<PathBuf>,
    /// Where to write the device blob.
    #[arg(long, value_name = "FILE.vvb")]
    pub out: PathBuf,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let overrides = args.integrator.checked_overrides()?;
    if args.check_states == 0 {
        bail!("--check-states must be at least 1");
    }
    if args.check_steps == 0 {
        bail!("--check-steps must be at least 1 (a check of nothing proves nothing)");
    }
    let mut outputs = vec![("--out", args.out.as_path())];
    outputs.extend(args.json.as_deref().map(|p| ("--json", p)));
    crate::outputs::check_outputs(&[("--model", args.model.as_path())], &outputs)?;
    let src = BlobModel::read(&args.model)?;
    let state_bytes = 24 + 8 * src.dof as u128;
    check_memory("--check-states", args.check_states as u128, state_bytes)?;
    let range = TrainingRange::of_normalization(&src.offset, &src.scale);
    let check = ExportCheck {
        steps: args.check_steps,
        states: args.check_states,
        range: &range,
        key: &|k: &str| format!("--{}", k.replace('_', "-")),
    };
    let (bytes, r) = export(&src, args.weights, &overrides, &check)?;
    let port = src.dissipation.is_some() || src.input.is_some();
    crate::deploy::verdict::refuse_untrusted(&r, port)?;
    write_atomic(&args.out, &bytes)?;
    if let Some(j) = &args.json {
        write_atomic(j, serde_json::to_string_pretty(&r)?.as_bytes())?;
    }
    println!("wrote {} ({} bytes)", args.out.display(), r.bytes);
    println!(
        "  weights {}, {} parameters, {:.2} bytes/parameter",
        format!("{:?}", r.weights).to_lowercase(),
        r.parameters,
        r.bytes_per_parameter
    );
    println!(
        "  integrator {} dt {} s x {} substeps; {} MAC/gradient, {} MAC/step{}",
        r.integrator,
        r.dt,
        r.substeps,
        r.macs_per_gradient,
        r.macs_per_step,
        if r.convergence.is_some() {
            " (at the iteration limit)"
        } else {
            ""
        }
    );
    if let Some(c) = &r.convergence {
        println!(
            "  convergence: {} states spanning {} x {} steps each needed at most {} iterations (limit {})",
            c.states, c.range, c.steps_each, c.iterations_needed, c.max_iterations
        );
    }
    println!(
        "  accuracy price over {} steps from {} states: max state deviation from the f32 model {:.3e} \
         (in normalization scales); learned-energy drift {:.3e} (f32) vs {:.3e} (exported), in energy scales",
        r.check_steps, args.check_states, r.max_state_deviation, r.energy_drift_reference, r.energy_drift_exported
    );
    println!("{}", crate::CAUTION);
    Ok(())
}
