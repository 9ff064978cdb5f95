//! `visviva simulate`: write reference trajectories of a built-in system to CSV.

use crate::data::log::write_csv;
use crate::reference::change::simulate_changed;
use crate::reference::simulate::{
    add_noise, add_position_noise, max_relative_energy_drift, simulate, SimulationSpec,
};
use crate::reference::{build_system, parse_param, CATALOG};
use std::path::PathBuf;

/// Generate reference trajectories from a built-in system. The list of
/// systems and parameters in `--help` is generated from the catalog.
#[derive(Debug, clap::Args)]
#[command(after_help = after_help())]
pub struct Args {
    /// Built-in system: flexure, crane, mount, double-pendulum and
    /// crane-cart (their mass matrices depend on the angles: fit them with
    /// --arch mechanical), or the
    /// damped/driven flexure-damped, drivetrain, flexure-squeeze and
    /// crane-trolley.
    #[arg(long, value_name = "NAME")]
    pub system: String,

    /// Override a system parameter, e.g. `--param k=35`; repeatable. An
    /// unknown key is an error that lists the valid keys.
    #[arg(long = "param", value_name = "KEY=VALUE", value_parser = parse_param)]
    pub params: Vec<(String, f64)>,

    /// Number of trajectories, each from its own random initial state.
    #[arg(long, value_name = "N")]
    pub trajectories: usize,

    /// Length of each trajectory in seconds.
    #[arg(long, value_name = "SECONDS")]
    pub duration: f64,

    /// Sampling rate in hertz.
    #[arg(long, value_name = "HZ")]
    pub rate: f64,

    /// Add Gaussian measurement noise to q and p (not t): standard deviation
    /// SIGMA times each coordinate's RMS over the whole data set. Noisy logs
    /// usually carry no derivatives, so with noise the dq/dp columns are
    /// left out unless --keep-derivatives is given.
    #[arg(long, value_name = "SIGMA", default_value_t = 0.0)]
    pub noise: f64,

    /// Add Gaussian noise of this standard deviation (in the q columns'
    /// units) to the positions only, as a position sensor would; the momenta
    /// stay clean. Derivative columns are then left out as with --noise.
    #[arg(
        long,
        value_name = "STD",
        default_value_t = 0.0,
        conflicts_with = "noise"
    )]
    pub position_noise: f64,

    /// With --noise, still write the (exact, noise-free) derivative columns.
    #[arg(long)]
    pub keep_derivatives: bool,

    /// A changed machine: from --change-at on, these parameters replace the
    /// system's (e.g. `--change l=8.8`); repeatable. Conservative systems
    /// only; the state is continuous across the change.
    #[arg(long = "change", value_name = "KEY=VALUE", value_parser = parse_param, requires = "change_at")]
    pub change: Vec<(String, f64)>,

    /// Time (s) of the change named by --change.
    #[arg(long, value_name = "SECONDS", requires = "change")]
    pub change_at: Option<f64>,

    /// Seed for the initial states and the noise.
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub seed: u64,

    /// Output CSV file.
    #[arg(long, value_name = "FILE.csv")]
    pub out: PathBuf,
}

/// Help text after the options: systems, parameters, output format.
fn after_help() -> String {
    let mut text = String::from(
        "Systems (parameters in SI units, key=default unit, meaning); the damped or driven\n\
         ones follow dx/dt = (J - R) dH/dx + G u:\n",
    );
    // Column widths from the catalog, so long names keep the table aligned.
    let name_w = CATALOG.iter().map(|e| e.name.len()).max().unwrap_or(0);
    let pad = " ".repeat(name_w + 4);
    let param = |p: &crate::reference::ParamSpec| format!("{}={} {}", p.name, p.default, p.unit);
    let param_w = CATALOG
        .iter()
        .flat_map(|e| e.params.iter().map(|p| param(p).len()))
        .max()
        .unwrap_or(0);
    for entry in CATALOG {
        text.push_str(&format!("  {:<name_w$}  {}\n", entry.name, entry.summary));
        for p in entry.params {
            text.push_str(&format!("{pad}{:<param_w$}  {}\n", param(p), p.meaning));
        }
    }
    text.push_str(
        "\nDriven systems add input columns u1..um (the excitation at each sample; a\n\
         multisine: per trajectory six tones, frequencies log-uniform in the stated\n\
         band, random phases). Their derivatives are (J - R) dH/dx + G u exactly.\n",
    );
    text.push_str(
        "\nOutput columns: traj,t,q1..qn,p1..pn,dq1..dqn,dp1..dpn. The derivatives are exact\n\
         (the system's equations of motion at the clean state). With --noise they are\n\
         omitted unless --keep-derivatives is given, as real noisy logs rarely carry them.\n\
         The same seed gives byte-identical output; the file is written atomically, so on\n\
         any error no output file is left behind.",
    );
    text
}

/// The checked noise level and the simulation settings of `args`.
fn spec_of(args: &Args) -> anyhow::Result<SimulationSpec> {
    anyhow::ensure!(
        args.noise.is_finite() && args.noise >= 0.0,
        "--noise must be a finite non-negative number (got {})",
        args.noise
    );
    Ok(SimulationSpec {
        trajectories: args.trajectories,
        duration: args.duration,
        rate: args.rate,
        seed: args.seed,
    })
}

/// Noise (when asked), then the CSV; returns whether derivative columns
/// were written and the summary line's common part.
fn write_log(
    args: &Args,
    ds: &mut crate::data::dataset::Dataset,
    name: &str,
    params: &crate::reference::ParamValues,
) -> anyhow::Result<String> {
    add_noise(ds, args.noise, args.seed)?;
    add_position_noise(ds, args.position_noise, args.seed)?;
    let with_derivatives =
        (args.noise == 0.0 && args.position_noise == 0.0) || args.keep_derivatives;
    write_csv(&args.out, ds, with_derivatives)?;
    let params: Vec<String> = params
        .iter()
        .map(|(k, v, u)| format!("{k}={v} {u}"))
        .collect();
    Ok(format!(
        "wrote {} trajectories x {} samples of '{name}' ({}; {} Hz, noise {}{}, derivatives {}",
        ds.trajectories.len(),
        ds.trajectories.first().map_or(0, |t| t.t.len()),
        params.join(", "),
        args.rate,
        args.noise,
        if args.position_noise > 0.0 {
            format!(", position noise {}", args.position_noise)
        } else {
            String::new()
        },
        if with_derivatives { "exact" } else { "omitted" },
    ))
}

/// Run the command.
pub fn run(args: Args) -> anyhow::Result<()> {
    let system = build_system(&args.system, &args.params)?;
    let spec = spec_of(&args)?;
    spec.check_output(system.as_ref(), &args.out)?;
    crate::outputs::check_outputs(&[], &[("--out", args.out.as_path())])?;
    let mut ds = match args.change_at {
        Some(at) => {
            let mut changed = args.params.clone();
            changed.extend(args.change.iter().cloned());
            let after = build_system(&args.system, &changed)?;
            simulate_changed(system.as_ref(), after.as_ref(), at, &spec)?
        }
        None => simulate(system.as_ref(), &spec)?,
    };
    let line = write_log(&args, &mut ds, system.name(), system.params())?;
    if system.has_port_terms() {
        println!(
            "{line}, {} input columns) to {}",
            system.inputs(),
            args.out.display()
        );
    } else if let Some(at) = args.change_at {
        println!(
            "{line}) to {}; parameters changed at t = {at} s",
            args.out.display()
        );
    } else {
        let drift = max_relative_energy_drift(system.as_ref(), &ds);
        println!(
            "{line}) to {}; max relative energy drift {drift:.1e}",
            args.out.display()
        );
    }
    Ok(())
}
