//! `visviva inspect`: what a blob holds and what it costs on a device — format
//! version, CRC status, architecture, weight storage, bytes per section,
//! the training envelope, runtime RAM and multiply-accumulates — as a
//! table or JSON.

use std::path::PathBuf;

use anyhow::{anyhow, Context, Result};

use crate::deploy::inspect::inspect;

/// Arguments of `visviva inspect`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The blob to inspect.
    #[arg(value_name = "MODEL.vvb")]
    pub file: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let bytes = std::fs::read(&args.file)
        .with_context(|| format!("{}: cannot read", args.file.display()))?;
    let r = inspect(&bytes).map_err(|e| anyhow!("{}: {e}", args.file.display()))?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&r)?);
        return Ok(());
    }
    println!("{}", args.file.display());
    let row = |k: &str, v: String| println!("  {k:<25} {v}");
    row("format version", r.format_version.to_string());
    row("crc-32", r.crc.clone());
    row("size", format!("{} bytes", r.bytes));
    row("degrees of freedom", r.dof.to_string());
    row("architecture", r.architecture.clone());
    row("weights", r.weights.clone());
    row(
        "parameters",
        format!(
            "{} ({:.2} bytes each)",
            r.parameters,
            r.bytes as f64 / r.parameters.max(1) as f64
        ),
    );
    for (name, b) in &r.sections {
        row(&format!("  {name}"), format!("{b} bytes"));
    }
    let implicit = matches!(r.integrator.as_str(), "midpoint" | "discrete-gradient");
    let it = if implicit {
        format!(
            "{} dt {} s x {} substeps, <= {} iterations, tol {:e}",
            r.integrator, r.dt, r.substeps, r.max_iterations, r.tolerance
        )
    } else {
        format!("{} dt {} s x {} substeps", r.integrator, r.dt, r.substeps)
    };
    row("integrator", it);
    if r.damped || r.inputs > 0 {
        let mut terms = Vec::new();
        if let Some(form) = &r.dissipation_form {
            terms.push(format!("damping R = L L^T ({form})"));
        }
        if let Some(form) = &r.input_form {
            terms.push(format!("{} input(s) through G ({form})", r.inputs));
        }
        row("port terms", terms.join(", "));
    }
    match &r.envelope {
        Some(rows) => {
            row(
                "training envelope",
                "training range widened by a tenth on each side".into(),
            );
            for e in rows {
                row(
                    &format!("  {}", e.coordinate),
                    format!("[{}, {}]", e.lower, e.upper),
                );
            }
        }
        None => row(
            "training envelope",
            "none (format version 3 or older; observers need bounds of their own)".into(),
        ),
    }
    row(
        "runtime RAM",
        format!(
            "~{} bytes (model value + stack scratch at W = {})",
            r.runtime_ram_bytes, r.max_width
        ),
    );
    match &r.runtime {
        Some(rt) => {
            row(
                "runtime flash",
                format!(
                    "{} bytes + blob {} bytes = {} bytes ({})",
                    rt.flash_bytes,
                    r.bytes,
                    rt.flash_bytes + r.bytes as u64,
                    rt.config
                ),
            );
            row(
                "runtime stack",
                format!(
                    "{} bytes, static RAM {} bytes (measured at D = 2, W = 32)",
                    rt.stack_bytes, rt.static_ram_bytes
                ),
            );
        }
        None => row(
            "runtime flash, stack",
            "not measured for this model kind, integrator and weights (see `cargo xtask footprint`)".into(),
        ),
    }
    row("MAC per gradient", r.macs_per_gradient.to_string());
    row(
        "MAC per step",
        format!(
            "{}{}",
            r.macs_per_step,
            if implicit {
                " (at the iteration limit)"
            } else {
                ""
            }
        ),
    );
    println!("  (runtime figures: {})", r.runtime_source);
    Ok(())
}
