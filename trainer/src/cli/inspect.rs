//! `visviva inspect`: what a blob holds and what it costs on a device — format
//! version, CRC status, architecture, weight storage, bytes per section,
//! the training envelope, runtime RAM and multiply-accumulates — as a
//! table or JSON.

use std::io::Write;
use std::path::PathBuf;

use anyhow::{anyhow, Context, Result};

use crate::deploy::inspect::{inspect, Inspection};

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

/// Run the command. A reader that closes the pipe early (`| head`) ends
/// the output quietly.
pub fn run(args: Args) -> Result<()> {
    let bytes = std::fs::read(&args.file)
        .with_context(|| format!("{}: cannot read", args.file.display()))?;
    let r = inspect(&bytes).map_err(|e| anyhow!("{}: {e}", args.file.display()))?;
    let text = if args.json {
        serde_json::to_string_pretty(&r)?
    } else {
        table(&args.file.display().to_string(), &r)
    };
    let mut out = std::io::stdout().lock();
    match writeln!(out, "{text}").and_then(|()| out.flush()) {
        Err(e) if e.kind() != std::io::ErrorKind::BrokenPipe => Err(e.into()),
        _ => Ok(()),
    }
}

/// The table: one `key value` row per figure, in reading order.
fn table(file: &str, r: &Inspection) -> String {
    let implicit = matches!(r.integrator.as_str(), "midpoint" | "discrete-gradient");
    let mut rows = blob_rows(r);
    rows.push(("integrator".into(), integrator(r, implicit)));
    rows.extend(port_row(r));
    rows.extend(envelope_rows(r));
    rows.extend(runtime_rows(r));
    rows.extend(cost_rows(r, implicit));
    let mut text = format!("{file}\n");
    for (k, v) in rows {
        text.push_str(&format!("  {k:<25} {v}\n"));
    }
    text.push_str(&format!("  (runtime figures: {})", r.runtime_source));
    text
}

type Rows = Vec<(String, String)>;

/// Format, size, shape and the bytes of each section.
fn blob_rows(r: &Inspection) -> Rows {
    let mut rows: Rows = vec![
        ("format version".into(), r.format_version.to_string()),
        ("crc-32".into(), r.crc.clone()),
        ("size".into(), format!("{} bytes", r.bytes)),
        ("degrees of freedom".into(), r.dof.to_string()),
        ("architecture".into(), r.architecture.clone()),
        ("weights".into(), r.weights.clone()),
        (
            "parameters".into(),
            format!(
                "{} ({:.2} bytes each)",
                r.parameters,
                r.bytes as f64 / r.parameters.max(1) as f64
            ),
        ),
    ];
    for (name, b) in &r.sections {
        rows.push((format!("  {name}"), format!("{b} bytes")));
    }
    rows
}

fn integrator(r: &Inspection, implicit: bool) -> String {
    if implicit {
        format!(
            "{} dt {} s x {} substeps, <= {} iterations, tol {:e}",
            r.integrator, r.dt, r.substeps, r.max_iterations, r.tolerance
        )
    } else {
        format!("{} dt {} s x {} substeps", r.integrator, r.dt, r.substeps)
    }
}

/// Damping and input terms, when the blob has them.
fn port_row(r: &Inspection) -> Option<(String, String)> {
    if !(r.damped || r.inputs > 0) {
        return None;
    }
    let mut terms = Vec::new();
    if let Some(form) = &r.dissipation_form {
        terms.push(format!("damping R = L L^T ({form})"));
    }
    if let Some(form) = &r.input_form {
        terms.push(format!("{} input(s) through G ({form})", r.inputs));
    }
    Some(("port terms".into(), terms.join(", ")))
}

fn envelope_rows(r: &Inspection) -> Rows {
    let Some(bounds) = &r.envelope else {
        return vec![(
            "training envelope".into(),
            "none (format version 3 or older; observers need bounds of their own)".into(),
        )];
    };
    let mut rows: Rows = vec![(
        "training envelope".into(),
        "training range widened by a tenth on each side".into(),
    )];
    for e in bounds {
        rows.push((
            format!("  {}", e.coordinate),
            format!("[{}, {}]", e.lower, e.upper),
        ));
    }
    rows
}

/// RAM, and the runtime's own measured flash and stack.
fn runtime_rows(r: &Inspection) -> Rows {
    let mut rows: Rows = vec![(
        "runtime RAM".into(),
        format!(
            "~{} bytes (model value + stack scratch at W = {})",
            r.runtime_ram_bytes, r.max_width
        ),
    )];
    match &r.runtime {
        Some(rt) => {
            rows.push((
                "runtime flash".into(),
                format!(
                    "{} bytes + blob {} bytes = {} bytes ({})",
                    rt.flash_bytes,
                    r.bytes,
                    rt.flash_bytes + r.bytes as u64,
                    rt.config
                ),
            ));
            rows.push((
                "runtime stack".into(),
                format!(
                    "{} bytes, static RAM {} bytes (measured at D = 2, W = 32)",
                    rt.stack_bytes, rt.static_ram_bytes
                ),
            ));
        }
        None => rows.push((
            "runtime flash, stack".into(),
            "not measured for this model kind, integrator and weights (see `cargo xtask footprint`)"
                .into(),
        )),
    }
    rows
}

/// Multiply-accumulates per gradient and per step.
fn cost_rows(r: &Inspection, implicit: bool) -> Rows {
    let bound = if implicit {
        " (at the iteration limit)"
    } else {
        ""
    };
    vec![
        ("MAC per gradient".into(), r.macs_per_gradient.to_string()),
        ("MAC per step".into(), format!("{}{bound}", r.macs_per_step)),
    ]
}
