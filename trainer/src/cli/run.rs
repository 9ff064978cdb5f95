//! `visviva run DIR`: the whole path from logs to device blobs in one command,
//! driven by `DIR/visviva.toml`. Produces `DIR/out/`: the fitted model and
//! baseline, one blob per export target, golden rollouts for the device
//! check, `report.json` and `report.html`. The stages live in
//! [`crate::project::pipeline`]; this command calls them in order and
//! prints what each found.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::Result;

use crate::cli::tables::{print_port, print_table};
use crate::evidence::report::{Evidence, RunReport};
use crate::project::pipeline::{self, Checked, Prepared};

/// Arguments of `visviva run`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Project folder holding visviva.toml.
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,
    /// Refit and re-export even when nothing changed.
    #[arg(long)]
    pub force: bool,
    /// No progress bars.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Run the command.
pub fn run(args: Args) -> Result<()> {
    let started = Instant::now();
    // Ctrl-C from here on stops the fit cleanly (an interrupted fit is an
    // error and records nothing).
    crate::learn::stage::interrupt_flag();
    let prep = pipeline::prepare(&args.dir)?;
    println!(
        "visviva run: {} ({})",
        prep.name,
        prep.dir.join("visviva.toml").display()
    );
    println!("[1/5] data");
    print_data(&prep);
    if let Some(s) = &prep.selection {
        s.lines().iter().for_each(|l| println!("{l}"));
    }
    let fit = fit_step(&prep, &args)?;
    println!(
        "[3/5] check: model vs baseline on {} validation trajectories",
        prep.logs.val.trajectories.len()
    );
    let checked = pipeline::check(&prep, &fit)?;
    match &checked.evidence {
        Evidence::Check(r) => print_table(r),
        Evidence::Port(r) => print_port(r),
    }
    let devices = export_step(&prep, &checked, args.force)?;
    println!("[5/5] report");
    let report = pipeline::report(&prep, fit, checked, devices)?;
    print_summary(&report, started);
    println!("report: {}", prep.out.join("report.html").display());
    println!("{}", crate::CAUTION);
    Ok(())
}

fn print_data(prep: &Prepared) {
    let d = &prep.data;
    println!(
        "      {} training trajectories ({} samples), {} validation, {} dof, derivatives {}{}",
        d.train_trajectories,
        d.train_samples,
        d.validation_trajectories,
        d.dof,
        d.derivatives,
        if prep.port() {
            format!(
                "; damped/driven model: {} input(s), {}",
                d.inputs,
                prep.plan.terms.label(d.dof)
            )
        } else {
            String::new()
        }
    );
    if let Some(rig) = &prep.logs.rig {
        for line in rig.lines() {
            println!("      {line}");
        }
    }
    if let Some(inertia) = &prep.logs.inertia {
        for line in inertia.lines() {
            println!("      {line}");
        }
    }
    println!("      {}", prep.mode);
    if let Some(tp) = &prep.trajectory {
        println!(
            "      trajectory matching: windows of {} steps, {} epochs after a derivative warm start",
            tp.window_steps, tp.epochs
        );
        println!("      {}", tp.energy_scale_note());
    }
}

fn fit_step(prep: &Prepared, args: &Args) -> Result<pipeline::FitResult> {
    let model_path = prep.out.join("model.vvb");
    let parameters = prep.plan.arch.param_count(prep.data.dof);
    let fit = pipeline::fit(prep, args.force, args.quiet)?;
    if fit.fit.reused {
        println!(
            "[2/5] fit: inputs unchanged, reusing {}",
            model_path.display()
        );
    } else {
        println!("[2/5] fit: {parameters} parameters");
        if let Some(b) = &fit.baseline_fit {
            println!(
                "      baseline (plain vector field, same hidden sizes{}): best validation loss {:.3e} (normalized units)",
                if prep.data.inputs > 0 {
                    ", state and inputs in"
                } else {
                    ""
                },
                b.best_validation_loss
            );
        }
    }
    println!(
        "      energy model: best validation loss {:.3e} (normalized units, epoch {}), {:.1} s; {}",
        fit.fit.best_validation_loss, fit.fit.best_epoch, fit.fit.seconds, fit.fit.stop
    );
    Ok(fit)
}

fn export_step(
    prep: &Prepared,
    checked: &Checked,
    force: bool,
) -> Result<Vec<crate::evidence::report::DeviceBlob>> {
    let golden = pipeline::golden_steps(prep, checked);
    if prep.logs.train.driven() && golden < prep.project.check.golden_steps {
        println!(
            "      note: golden rollouts take {golden} steps, the length of held-out trajectory {}'s input sequence ([check] golden_steps = {})",
            prep.logs.val.trajectories.first().map_or("", |t| t.id.as_str()),
            prep.project.check.golden_steps
        );
    }
    let targets = prep.project.export_targets();
    println!("[4/5] export: {} device blob(s)", targets.len());
    let exported = pipeline::export(prep, checked, force)?;
    for e in &exported {
        let d = &e.device;
        if e.reused {
            println!("      {}: inputs unchanged, reusing", d.name);
        }
        let iterations = d.export.convergence.as_ref().map_or(String::new(), |c| {
            format!(
                " (at most {} of {} iterations needed over the training range)",
                c.iterations_needed, c.max_iterations
            )
        });
        println!(
            "      {}: {} bytes ({}), {} MAC/step{iterations}, max deviation from f32 {:.2e}, budget {}",
            d.name,
            d.export.bytes,
            format!("{:?}", d.export.weights).to_lowercase(),
            d.export.macs_per_step,
            d.export.max_state_deviation,
            if d.budget.pass { "pass" } else { "FAIL" }
        );
        if let Some(q) = &d.export.qat {
            println!("        {}", qat_line(q));
        }
        for a in &d.budget.advice {
            println!("        {a}");
        }
        println!("        {}", held_out_line(&d.held_out));
    }
    Ok(exported.into_iter().map(|e| e.device).collect())
}

/// What the quantization-aware fine-tuning of an int8 blob did.
fn qat_line(q: &crate::learn::qat::QatSummary) -> String {
    let outcome = if q.kept {
        "fine-tuned weights quantized"
    } else {
        "not better: the f32 fit's weights quantized"
    };
    format!(
        "quantization-aware fine-tuning: {} steps (lr {:e}, seed {}), validation loss rounded f32 fit {:.3e} -> fine-tuned {:.3e} (f32 {:.3e}); {outcome}",
        q.steps, q.learning_rate, q.seed, q.loss_rounded, q.loss_fine_tuned, q.loss_f32
    )
}

/// An exported blob on the held-out logs, for the export lines.
fn held_out_line(h: &crate::evidence::held_out::HeldOut) -> String {
    let at: Vec<String> = h
        .horizons
        .iter()
        .map(|x| {
            let e = x
                .state_rel_rmse
                .map_or("not reached".into(), |v| format!("{v:.2e}"));
            format!("{} s {e}", x.seconds)
        })
        .collect();
    let drift = h
        .learned_energy_drift
        .map_or(String::new(), |d| format!(", learned-energy drift {d:.2e}"));
    format!(
        "on the held-out logs: state error {:.2e} (at {}){drift}",
        h.state_rel_rmse,
        at.join(", ")
    )
}

fn print_summary(report: &RunReport, started: Instant) {
    if let Some(u) = &report.underfit {
        println!("{}", u.message());
    }
    let verdict = if report.budget_pass {
        "PASS"
    } else {
        "FAIL (see the report)"
    };
    let seconds = started.elapsed().as_secs_f64();
    match &report.evidence {
        Evidence::Check(c) => {
            let m = &c.median_model;
            let base = c.median_baseline.as_ref();
            println!(
                "done in {seconds:.1} s: state error {:.2e} (baseline {}), energy drift {} (baseline {}); device budget {verdict}",
                m.state_rel_rmse,
                base.map_or("-".into(), |b| format!("{:.2e}", b.state_rel_rmse)),
                m.true_energy_drift
                    .or(m.learned_energy_drift)
                    .map_or("-".into(), |v| format!("{v:.2e}")),
                base.and_then(|b| b.true_energy_drift)
                    .map_or("-".into(), |v| format!("{v:.2e}")),
            );
        }
        Evidence::Port(p) => println!(
            "done in {seconds:.1} s: driven state error {:.2e} (baseline {}) on held-out input sequences; device budget {verdict}",
            p.median_model_state_rel_rmse,
            p.median_baseline_state_rel_rmse
                .map_or("-".into(), |v| format!("{v:.2e}")),
        ),
    }
}
