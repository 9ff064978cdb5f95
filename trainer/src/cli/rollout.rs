//! `visviva rollout`: step a blob on the host through `visviva-runtime` — the
//! device's arithmetic — and write the trajectory as CSV, optionally as exact
//! f32 bit patterns for bit-for-bit comparison with a board. A blob's rows
//! carry the velocities v = dH/dp after the momenta, and `--init` takes
//! velocities `v*` instead of momenta, converted with the model's own mass
//! matrix p = M(q) v (refused, with the reason, for a model without one).
//! The rollout streams: each row is written as its state is computed, so
//! memory does not grow with `--steps`; a file output appears only when
//! complete. A rollout that stops part-way (a step the integrator cannot
//! take) keeps what it computed: `--out run.csv` then writes
//! `run.partial.csv` (and leaves `run.csv` as it was), and the command
//! exits non-zero naming the step and the reason. A baseline file
//! (`fit --baseline`) rolls out the same way, by RK4 at `--dt`, from any
//! state given by momenta (its rows carry no velocity columns).

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};

use std::io::Write as _;

use crate::atomic::write_atomic_routed;
use crate::capacity::check_disk;
use crate::cli::shared_args::IntegratorArgs;
use crate::deploy::blob::{BlobModel, HostModel};
use crate::deploy::envelope::{Envelope, FarState};
use crate::deploy::fitted_blob::read_baseline;
use crate::deploy::rollout::{
    csv_row_bytes, parse_init, parse_init_spec, stream_csv, stream_rows, InputRows, Rates,
    RowSettings, Streamed,
};
use crate::interrupt::Watch;

/// Arguments of `visviva rollout`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The blob to step, or a baseline file (`M.baseline.json`, written by
    /// `fit --baseline`), stepped by RK4 at --dt.
    #[arg(long, value_name = "MODEL.vvb")]
    pub model: PathBuf,
    /// Initial state, every coordinate named once: "q1=0.5,p1=0", or with
    /// velocities "q1=0.5,v1=0.2" (converted with the model's own mass
    /// matrix, p = M(q) v; a baseline file takes momenta only).
    #[arg(long, value_name = "q1=X,..,p1=Y|v1=Y,..")]
    pub init: String,
    /// Number of steps (any number: the rollout streams; with --out the
    /// disk must have room for the file).
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
    let overrides = args.integrator.checked_overrides()?;
    let mut inputs = vec![("--model", args.model.as_path())];
    inputs.extend(args.inputs.as_deref().map(|p| ("--inputs", p)));
    let partial = args.out.as_deref().map(partial_path);
    let mut outputs: Vec<_> = args
        .out
        .as_deref()
        .map(|p| ("--out", p))
        .into_iter()
        .collect();
    outputs.extend(partial.as_deref().map(|p| ("--out (its partial file)", p)));
    crate::outputs::check_outputs(&inputs, &outputs)?;
    if is_baseline(&args.model) {
        return run_baseline(&args);
    }
    let bytes = std::fs::read(&args.model)
        .map_err(|e| anyhow!("{}: cannot read: {e}", args.model.display()))?;
    let model =
        HostModel::from_bytes(&bytes).map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    let model = model
        .with_integrator(overrides.apply(model.integrator()))
        .map_err(|e| anyhow!("{e}"))?;
    let dof = visviva_runtime::Hamiltonian::dof(&model);
    let x0 = initial_state(&model, &args.init, dof)?;
    let envelope = BlobModel::from_bytes(&bytes)
        .map(|b| Envelope::of(&b))
        .map_err(|e| anyhow!("{}: {e}", args.model.display()))?;
    if let Some(far) = envelope.far(0, &x0) {
        eprintln!("{}", far.warning(dof));
    }
    let mut inputs = open_inputs(&args, visviva_runtime::Hamiltonian::inputs(&model))?;
    let fill = |_: usize, u: &mut [f32]| match inputs.as_mut() {
        Some(rows) => rows.next_into(u).map(|_| ()),
        None => Ok(()),
    };
    let watch = Watch::new();
    let stream = |w: &mut dyn std::io::Write| {
        let envelope = Some(&envelope);
        stream_csv(
            &model, &x0, args.steps, fill, args.bits, true, watch, envelope, w,
        )
    };
    let streamed = write_rollout(&args, dof, true, stream)?;
    warn_later(streamed.far, dof);
    eprintln!("{}", crate::CAUTION);
    stopped_part_way(&streamed, args.out.as_deref())
}

/// The initial state (q, p) of `--init`: momenta as given, or velocities
/// converted with the model's own mass matrix p = M(q) v (a quadratic
/// kinetic term, or the mechanical M(q)^-1 = L L^T + eps I); a model whose
/// velocity is not linear in p is refused with the reason.
fn initial_state(model: &HostModel<'_>, spec: &str, dof: usize) -> Result<Vec<f32>> {
    let init = parse_init_spec(spec, dof)?;
    let p = match init.rates {
        Rates::Momenta(p) => p,
        Rates::Velocities(v) => {
            let mut p = vec![0.0f32; dof];
            model
                .momentum_from_velocity_at(&init.q, &v, &mut p)
                .with_context(|| {
                    format!(
                        "--init: v1..v{dof} cannot be converted to momenta for this model: \
                         its kinetic energy is not quadratic in p (a network kinetic term or a \
                         general energy H(q, p)), so there is no mass matrix with p = M(q) v; \
                         give the momenta p1..p{dof}"
                    )
                })?;
            p
        }
    };
    Ok(init.q.into_iter().chain(p).collect())
}

/// Whether `--model` names a baseline file (`*.baseline.json`).
fn is_baseline(p: &Path) -> bool {
    p.to_string_lossy().ends_with(".baseline.json")
}

/// Roll out the plain vector-field baseline by RK4 at `--dt` (as `check`
/// steps it), inputs held over each step; a step that gives NaN or
/// infinity stops the rollout part-way.
fn run_baseline(args: &Args) -> Result<()> {
    let o = args.integrator.overrides();
    if o.integrator.is_some()
        || o.substeps.is_some()
        || o.max_iterations.is_some()
        || o.tolerance.is_some()
    {
        bail!(
            "{}: a baseline is stepped by RK4 at --dt; --integrator, --substeps, \
             --max-iterations and --tolerance apply to blobs",
            args.model.display()
        );
    }
    let dt = o.dt.with_context(|| {
        format!(
            "{}: a baseline has no time step of its own: pass --dt (check steps it at the \
             log's sampling interval)",
            args.model.display()
        )
    })?;
    let base = read_baseline(&args.model)?;
    let dof = base.dof;
    let x0 = parse_init(&args.init, dof)?;
    let envelope = Envelope::new(base.norm.offset.clone(), base.norm.scale.clone());
    if let Some(far) = envelope.far(0, &x0) {
        eprintln!("{}", far.warning(dof));
    }
    let mut inputs = open_inputs(args, base.input_scale.len())?;
    let mut u = vec![0.0f32; base.input_scale.len()];
    let step = |_: usize, x: &mut [f32]| {
        u.iter_mut().for_each(|v| *v = 0.0);
        if let Some(rows) = inputs.as_mut() {
            rows.next_into(&mut u)?;
        }
        base.step_rk4_driven(x, &u, dt);
        let finite = x.iter().all(|v| v.is_finite());
        Ok((!finite).then(|| "the baseline's RK4 step produced NaN or infinity".to_string()))
    };
    let watch = Watch::new();
    let stream = |w: &mut dyn std::io::Write| {
        let rows = RowSettings {
            dof,
            dt,
            bits: args.bits,
            watch,
            envelope: Some(&envelope),
            velocity: None,
        };
        stream_rows(&rows, &x0, args.steps, step, w)
    };
    let streamed = write_rollout(args, dof, false, stream)?;
    warn_later(streamed.far, dof);
    eprintln!("{}", crate::CAUTION);
    stopped_part_way(&streamed, args.out.as_deref())
}

/// Stream the rollout into `--out` (the partial file when a step fails)
/// or standard output.
fn write_rollout(
    args: &Args,
    dof: usize,
    velocities: bool,
    stream: impl FnOnce(&mut dyn std::io::Write) -> Result<Streamed>,
) -> Result<Streamed> {
    let Some(p) = &args.out else {
        let mut w = std::io::BufWriter::new(std::io::stdout().lock());
        let s = stream(&mut w)?;
        w.flush()?;
        return Ok(s);
    };
    let rows = (args.steps as u128).saturating_add(1);
    check_disk(
        "--steps",
        p,
        rows.saturating_mul(csv_row_bytes(dof, args.bits, velocities)),
    )?;
    let mut streamed = None;
    let written = write_atomic_routed(p, |w| {
        let s = stream(w)?;
        let to = s.failure.as_ref().map(|_| partial_path(p));
        streamed = Some(s);
        Ok(to)
    })?;
    let s = streamed.context("the rollout wrote nothing")?;
    eprintln!("wrote {} ({} states)", written.display(), s.rows());
    Ok(s)
}

/// The error of a rollout that stopped part-way: the step, why, and where
/// the states computed before it are.
fn stopped_part_way(streamed: &Streamed, out: Option<&Path>) -> Result<()> {
    let Some(why) = streamed.failure_text() else {
        return Ok(());
    };
    let kept = match out {
        Some(p) => format!(
            "{} holds them, marked partial by its name ({} was not written)",
            partial_path(p).display(),
            p.display()
        ),
        None => "standard output holds them and stops there".to_string(),
    };
    let rows = streamed.rows();
    let states = if rows == 1 { "state" } else { "states" };
    bail!(
        "the rollout stopped part-way at {why}; the {rows} {states} computed before it \
         are kept: {kept}"
    )
}

/// Where a rollout that stopped part-way writes what it computed: `--out`
/// with `.partial` before its extension (`run.csv` -> `run.partial.csv`).
fn partial_path(out: &Path) -> PathBuf {
    let stem = out.file_stem().unwrap_or_default().to_string_lossy();
    let name = match out.extension() {
        Some(ext) => format!("{stem}.partial.{}", ext.to_string_lossy()),
        None => format!("{stem}.partial"),
    };
    out.with_file_name(name)
}

/// Warn when the rollout left the training data after its first state
/// (the initial state was judged before the first step).
fn warn_later(far: Option<FarState>, dof: usize) {
    if let Some(f) = far.filter(|f| f.step > 0) {
        eprintln!("{}", f.warning(dof));
    }
}

/// The input rows of a driven model, checked whole (values and count)
/// before the first step and then read one at a time.
fn open_inputs(args: &Args, m: usize) -> Result<Option<InputRows>> {
    match &args.inputs {
        Some(p) => {
            let rows = InputRows::count(p, m)?;
            if rows < args.steps {
                bail!(
                    "{}: {rows} input rows for {} steps",
                    p.display(),
                    args.steps
                );
            }
            Ok(Some(InputRows::open(p, m)?))
        }
        None if m > 0 => {
            bail!("the model takes {m} inputs: pass --inputs FILE.csv (columns t,u1..u{m})")
        }
        None => Ok(None),
    }
}
