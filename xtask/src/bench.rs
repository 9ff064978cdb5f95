//! `cargo xtask bench`: training throughput of Visviva's trainer against our
//! reference trainers of the same problem on general-purpose frameworks
//! (`bench/hnn_torch.py`, `bench/hnn_jax.py`, CPU only).
//!
//! The problem: the ideal mass-spring H = p^2/2 + q^2/2, 64 trajectories x 64
//! samples over one period (radius uniform in [0.2, 1], seeded phase), exact
//! derivatives, written once as a CSV that all three read; a general 2-64-64-1
//! tanh energy network, f32, Adam, 2000 steps, batch 256, 1024 and full
//! batch, on 1 and 2 threads (the scaling line: 2-thread / 1-thread
//! throughput). Then the large-log line ([`crate::bench_large`]). Runs alternate between the implementations within every
//! round (the starting one rotates), and each number printed is a median over
//! the rounds; ratios are medians of the per-round ratios. The Python side
//! lives in a virtual environment under `target/bench-venv`, created on first
//! use.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};
use visviva_blob_support::{Generator, SplitMix64};

const USAGE: &str =
    "usage: cargo xtask bench [--rounds N] [--steps N] [--only visviva,torch,jax] [--large-samples N]";

/// Trajectories in the generated log.
const TRAJECTORIES: usize = 64;
/// Samples per trajectory (one period of the unit-frequency oscillator).
const SAMPLES: usize = 64;
/// Hidden widths of the energy network.
const HIDDEN: [usize; 2] = [64, 64];
/// Minibatch sizes: a typical minibatch, a large one and the full data set.
const BATCHES: [usize; 3] = [256, 1024, TRAJECTORIES * SAMPLES];
const LR: &str = "1e-3";

/// Command-line options.
struct Options {
    rounds: usize,
    steps: usize,
    impls: Vec<Impl>,
    /// Samples per trajectory of the large log (0: skip it).
    large_samples: usize,
}

#[derive(Clone, Copy, PartialEq, Eq, Debug)]
enum Impl {
    Visviva,
    Torch,
    Jax,
}

impl Impl {
    const ALL: [Impl; 3] = [Impl::Visviva, Impl::Torch, Impl::Jax];

    fn name(self) -> &'static str {
        match self {
            Impl::Visviva => "visviva",
            Impl::Torch => "torch",
            Impl::Jax => "jax",
        }
    }
}

fn parse_options(args: &[String]) -> Result<Options> {
    let mut o = Options {
        rounds: 3,
        steps: 2000,
        impls: Impl::ALL.to_vec(),
        large_samples: crate::bench_large::SAMPLES,
    };
    let mut it = args.iter();
    while let Some(a) = it.next() {
        let mut value = |name: &str| -> Result<String> {
            it.next()
                .cloned()
                .with_context(|| format!("{name} needs a value\n{USAGE}"))
        };
        match a.as_str() {
            "--rounds" => o.rounds = value("--rounds")?.parse().context("--rounds")?,
            "--steps" => o.steps = value("--steps")?.parse().context("--steps")?,
            "--large-samples" => {
                o.large_samples = value("--large-samples")?
                    .parse()
                    .context("--large-samples")?
            }
            "--only" => {
                let list = value("--only")?;
                o.impls = Vec::new();
                for name in list.split(',') {
                    match Impl::ALL.iter().find(|i| i.name() == name) {
                        Some(i) => o.impls.push(*i),
                        None => bail!("--only: unknown implementation `{name}`\n{USAGE}"),
                    }
                }
            }
            other => bail!("unknown argument `{other}`\n{USAGE}"),
        }
    }
    if o.rounds == 0 || o.steps == 0 {
        bail!("--rounds and --steps must be at least 1");
    }
    Ok(o)
}

/// The mass-spring log: exact solution q = r cos(t + phi), p = -r sin(t + phi)
/// of H = p^2/2 + q^2/2 (unit mass and stiffness, period 2 pi), sampled at
/// k * 2 pi / 64, k = 0..63, with exact derivatives dq/dt = p, dp/dt = -q.
pub fn mass_spring_csv() -> String {
    let mut rng = SplitMix64(0x7676_6265_6e63_6831);
    let dt = std::f64::consts::TAU / SAMPLES as f64;
    let mut s = String::from("traj,t,q1,p1,dq1,dp1\n");
    for traj in 0..TRAJECTORIES {
        let radius = 0.2 + 0.8 * rng.uniform(0.0, 1.0);
        let phase = std::f64::consts::TAU * rng.uniform(0.0, 1.0);
        for k in 0..SAMPLES {
            let t = k as f64 * dt;
            let q = radius * (t + phase).cos();
            let p = -radius * (t + phase).sin();
            // Rust's `{}` for f64 is the shortest string that reads back
            // to the same value, so every reader sees identical numbers.
            let _ = writeln!(s, "{traj},{t},{q},{p},{p},{}", -q);
        }
    }
    s
}

fn write_file(path: &Path, text: &str) -> Result<()> {
    let tmp = path.with_extension("tmp");
    std::fs::write(&tmp, text).with_context(|| format!("writing {}", tmp.display()))?;
    std::fs::rename(&tmp, path).with_context(|| format!("renaming to {}", path.display()))
}

fn target_dir(root: &Path) -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"))
}

/// Create `target/bench-venv` and install `bench/requirements.txt` unless a
/// marker says this exact requirements file is already installed.
fn ensure_venv(root: &Path) -> Result<PathBuf> {
    let venv = root.join("target").join("bench-venv");
    let python = venv.join("bin").join("python");
    let reqs_path = root.join("bench").join("requirements.txt");
    let reqs = std::fs::read_to_string(&reqs_path)
        .with_context(|| format!("reading {}", reqs_path.display()))?;
    let marker = venv.join("visviva-bench-installed.txt");
    if std::fs::read_to_string(&marker).ok().as_deref() == Some(reqs.as_str()) && python.exists() {
        return Ok(python);
    }
    if !python.exists() {
        println!("creating {}", venv.display());
        let ok = Command::new("python3")
            .args(["-m", "venv"])
            .arg(&venv)
            .status()
            .context("starting python3 -m venv (is Python 3 installed?)")?
            .success();
        if !ok {
            bail!("python3 -m venv {} failed", venv.display());
        }
    }
    println!(
        "installing {} into {} (PyTorch's Linux wheels on PyPI bring the CUDA runtime \
         libraries, about 3 GB; they are only loaded, never used)",
        reqs_path.display(),
        venv.display()
    );
    let ok = Command::new(&python)
        .args(["-m", "pip", "install", "-r"])
        .arg(&reqs_path)
        .status()
        .context("starting pip")?
        .success();
    if !ok {
        bail!("pip install -r {} failed", reqs_path.display());
    }
    write_file(&marker, &reqs)?;
    Ok(python)
}

fn build_visviva(root: &Path) -> Result<PathBuf> {
    let ok = Command::new(crate::tools::cargo())
        .args([
            "build",
            "--release",
            "-p",
            "visviva-trainer",
            "--bin",
            "visviva",
        ])
        .current_dir(root)
        .status()
        .context("starting cargo build")?
        .success();
    if !ok {
        bail!("cargo build --release -p visviva-trainer failed");
    }
    Ok(target_dir(root).join("release").join("visviva"))
}

/// One configuration of the benchmark.
#[derive(Clone, Copy)]
struct Config {
    batch: usize,
    threads: usize,
}

impl Config {
    fn label(self) -> String {
        format!("batch {} threads {}", self.batch, self.threads)
    }
}

/// What one run reported.
#[derive(Clone, Copy)]
struct RunResult {
    samples_per_second: f64,
    final_loss: f64,
}

/// The number after `"key":` in a flat JSON object (our own summaries).
fn json_number(text: &str, key: &str) -> Option<f64> {
    let at = text.find(&format!("\"{key}\""))? + key.len() + 2;
    let rest = text[at..].trim_start().strip_prefix(':')?.trim_start();
    let end = rest
        .find(|c: char| !(c.is_ascii_digit() || "+-.eE".contains(c)))
        .unwrap_or(rest.len());
    rest[..end].parse().ok()
}

struct Tools {
    visviva: PathBuf,
    python: Option<PathBuf>,
    taskset: bool,
    /// Visviva's initial parameters for the references (`--init`).
    init: Option<PathBuf>,
}

/// Run one implementation on one configuration, pinned to the first
/// `threads` CPUs with taskset when it is available.
fn run_one(
    tools: &Tools,
    root: &Path,
    work: &Path,
    data: &Path,
    imp: Impl,
    cfg: Config,
    steps: usize,
) -> Result<RunResult> {
    let json = work.join(format!(
        "{}-b{}-t{}.json",
        imp.name(),
        cfg.batch,
        cfg.threads
    ));
    let _ = std::fs::remove_file(&json);
    let shared = SharedArgs {
        data: data.display().to_string(),
        hidden: HIDDEN.map(|w| w.to_string()).join(","),
        batch: cfg.batch.to_string(),
        steps: steps.to_string(),
        threads: cfg.threads.to_string(),
        json: json.display().to_string(),
    };
    let (program, args) = match imp {
        Impl::Visviva => (tools.visviva.clone(), visviva_args(work, &shared)),
        Impl::Torch | Impl::Jax => (
            tools
                .python
                .clone()
                .context("no Python environment for the references")?,
            reference_args(root, imp, &shared, tools.init.as_deref()),
        ),
    };
    let out = pinned_command(tools, cfg, &program)
        .args(&args)
        .current_dir(root.join("bench"))
        .env("CUDA_VISIBLE_DEVICES", "")
        .env("PYTHONDONTWRITEBYTECODE", "1")
        .env("JAX_PLATFORMS", "cpu")
        .output()
        .with_context(|| format!("starting {}", program.display()))?;
    if !out.status.success() {
        bail!(
            "{} {} failed ({}):\n{}",
            imp.name(),
            cfg.label(),
            out.status,
            String::from_utf8_lossy(&out.stderr)
        );
    }
    read_summary(imp, &json)
}

/// The settings every implementation gets, as command-line values.
struct SharedArgs {
    data: String,
    hidden: String,
    batch: String,
    steps: String,
    threads: String,
    json: String,
}

impl SharedArgs {
    /// The flags every implementation takes alike; only the name of the
    /// step count differs (`visviva fit --optimizer-steps`, the reference
    /// scripts' `--steps`).
    fn common(&self, steps_flag: &str) -> Vec<String> {
        [
            "--data",
            &self.data,
            "--hidden",
            &self.hidden,
            "--batch",
            &self.batch,
            steps_flag,
            &self.steps,
            "--lr",
            LR,
            "--threads",
            &self.threads,
            "--json",
            &self.json,
        ]
        .map(String::from)
        .to_vec()
    }
}

/// `visviva fit` on the benchmark log: no validation split, no early stop.
fn visviva_args(work: &Path, a: &SharedArgs) -> Vec<String> {
    let model = work.join("visviva-model.vvb").display().to_string();
    let mut args = vec!["fit".to_string()];
    args.extend(a.common("--optimizer-steps"));
    args.extend(
        [
            "--val-fraction",
            "0",
            "--arch",
            "general",
            "--no-early-stop",
            "--quiet",
            "--out",
            &model,
        ]
        .map(String::from),
    );
    args
}

/// A reference script (`bench/hnn_<impl>.py`) from the shared initial weights.
fn reference_args(root: &Path, imp: Impl, a: &SharedArgs, init: Option<&Path>) -> Vec<String> {
    let script = root
        .join("bench")
        .join(format!("hnn_{}.py", imp.name()))
        .display()
        .to_string();
    let mut args = vec![script];
    args.extend(a.common("--steps"));
    if let Some(init) = init {
        args.push("--init".into());
        args.push(init.display().to_string());
    }
    args
}

/// `program` pinned to the first `cfg.threads` CPUs when taskset works.
fn pinned_command(tools: &Tools, cfg: Config, program: &Path) -> Command {
    if !tools.taskset {
        return Command::new(program);
    }
    let cpus = (0..cfg.threads)
        .map(|c| c.to_string())
        .collect::<Vec<_>>()
        .join(",");
    let mut c = Command::new("taskset");
    c.arg("-c").arg(cpus).arg(program);
    c
}

/// Throughput and final loss from the summary a run wrote.
fn read_summary(imp: Impl, json: &Path) -> Result<RunResult> {
    let text = std::fs::read_to_string(json)
        .with_context(|| format!("{} wrote no summary {}", imp.name(), json.display()))?;
    let get = |k: &str| {
        json_number(&text, k).with_context(|| format!("{}: no number `{k}`", json.display()))
    };
    Ok(RunResult {
        samples_per_second: get("samples_per_second")?,
        final_loss: get("final_train_loss")?,
    })
}

/// Visviva's seeded initial parameters, so the references start from the very
/// same network: `visviva fit` for one step at a learning rate of 1e-30 (the
/// first Adam update moves each parameter by about 1e-30, below f32
/// resolution for every nonzero weight), the blob decoded with
/// `visviva_runtime::format::decode`, and each layer written as three lines:
/// `outputs inputs`, the weights row by row, the biases. Rust prints each f32
/// as the shortest decimal that reads back to the same value.
fn write_initial_weights(tools: &Tools, work: &Path, data: &Path) -> Result<PathBuf> {
    let blob = work.join("visviva-init.vvb");
    let hidden = HIDDEN.map(|w| w.to_string()).join(",");
    let out = Command::new(&tools.visviva)
        .args(["fit", "--data"])
        .arg(data)
        .args([
            "--val-fraction",
            "0",
            "--arch",
            "general",
            "--hidden",
            &hidden,
        ])
        .args([
            "--batch",
            "4096",
            "--optimizer-steps",
            "1",
            "--lr",
            "1e-30",
            "--quiet",
            "--out",
        ])
        .arg(&blob)
        .output()
        .context("starting visviva fit for the initial weights")?;
    if !out.status.success() {
        bail!(
            "visviva fit (initial weights) failed:\n{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let bytes = std::fs::read(&blob).with_context(|| format!("reading {}", blob.display()))?;
    let desc = visviva_runtime::format::decode(&bytes)
        .map_err(|e| anyhow::anyhow!("{}: {e:?}", blob.display()))?;
    let visviva_runtime::format::EnergyDesc::General(mlp) = &desc.energy else {
        bail!("{}: expected a general energy network", blob.display());
    };
    let join =
        |it: &mut dyn Iterator<Item = f32>| it.map(|v| v.to_string()).collect::<Vec<_>>().join(" ");
    let mut text = String::new();
    for layer in &mlp.layers {
        let w = match layer.weights {
            visviva_runtime::format::WeightsDesc::F32(w) => w,
            visviva_runtime::format::WeightsDesc::F32Aligned(a) => a.values,
            _ => bail!("{}: expected f32 weights", blob.display()),
        };
        let _ = writeln!(text, "{} {}", layer.outputs, layer.inputs);
        let _ = writeln!(text, "{}", join(&mut w.iter()));
        let _ = writeln!(text, "{}", join(&mut layer.bias.iter()));
    }
    let path = work.join("initial-weights.txt");
    write_file(&path, &text)?;
    Ok(path)
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Floating-point operations per training sample of one optimizer step of
/// Visviva's trainer for the general energy network `sizes`
/// (`[inputs, hidden.., 1]`), counted from trainer/src/net.rs and hnn.rs:
/// a multiply-add is 2, every other arithmetic operation 1, tanh 1. Returns
/// (per-sample work, per-step work shared by the batch).
pub fn flops_per_sample(sizes: &[usize]) -> (f64, f64) {
    let l = sizes.len() - 1;
    let mac = |k: usize| (sizes[k] * sizes[k + 1]) as f64;
    let all: f64 = (0..l).map(mac).sum();
    let hidden_units: f64 = sizes[1..l].iter().sum::<usize>() as f64;
    // Forward: products, biases, activation value + s' + s'' (tanh, 1 - t*t,
    // -2*t*d: 5 operations).
    let forward = 2.0 * all + (sizes[1..].iter().sum::<usize>() as f64) + 5.0 * hidden_units;
    // Input gradient: d_k = g_k W_k, g_{k-1} = d_k * s'.
    let input_grad = 2.0 * all + hidden_units;
    // Tangent pass: zdot_k = adot_k W_k^T, adot_{k+1} = zdot_k * s'.
    let tangent = 2.0 * all + hidden_units;
    // Reverse pass: g_k^T adot_k every layer; zbar_k^T a_k, bias sums and
    // zbar_k W_k for the hidden layers; zbar_{k-1} = ab*s1 + d*zd*s2.
    let mut reverse = 0.0;
    for k in 0..l {
        reverse += 2.0 * mac(k);
        if k + 1 < l {
            reverse += 2.0 * mac(k) + sizes[k + 1] as f64;
            if k > 0 {
                reverse += 2.0 * mac(k);
            }
        }
        if k > 0 {
            reverse += 4.0 * sizes[k] as f64;
        }
    }
    // Loss: per component gain*u - t, square and sum, 2*e*gain/d.
    let loss = 7.0 * sizes[0] as f64;
    let params: f64 = (0..l).map(|k| mac(k) + sizes[k + 1] as f64).sum();
    // Per step: scale by 1/batch, clip norm (square + add), Adam (about 13:
    // two moment updates, bias corrections, sqrt, add, divide, multiply,
    // subtract).
    let per_step = params * (1.0 + 2.0 + 13.0);
    (forward + input_grad + tangent + reverse + loss, per_step)
}

/// CPU facts for the peak estimate.
struct Cpu {
    model: String,
    mhz: f64,
    fma: bool,
    avx2: bool,
    /// AVX-512 with the extensions the `multiversion` crate requires before
    /// it picks the trainer's AVX-512 product kernel (the Ice Lake set).
    avx512: bool,
}

fn cpu_info() -> Cpu {
    let text = std::fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
    let field = |name: &str| {
        text.lines()
            .find(|l| l.starts_with(name))
            .and_then(|l| l.split_once(':'))
            .map(|(_, v)| v.trim().to_string())
            .unwrap_or_default()
    };
    let flags = field("flags");
    let has = |f: &str| flags.split_whitespace().any(|x| x == f);
    Cpu {
        model: field("model name"),
        mhz: field("cpu MHz").parse().unwrap_or(0.0),
        fma: has("fma"),
        avx2: has("avx2"),
        avx512: [
            "avx512f",
            "avx512bw",
            "avx512cd",
            "avx512dq",
            "avx512vl",
            "avx512ifma",
            "avx512vbmi",
            "avx512_vbmi2",
            "avx512_vnni",
            "avx512_bitalg",
            "avx512_vpopcntdq",
            "gfni",
            "vaes",
            "vpclmulqdq",
        ]
        .iter()
        .all(|f| has(f)),
    }
}

fn shell_line(program: &str, args: &[&str]) -> String {
    Command::new(program)
        .args(args)
        .output()
        .ok()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
        .unwrap_or_default()
}

/// Every implementation's results per configuration, one entry per round:
/// `rounds[config][impl]`.
struct Measured<'a> {
    configs: &'a [Config],
    impls: &'a [Impl],
    rounds: Vec<Vec<Vec<RunResult>>>,
}

impl Measured<'_> {
    fn position(&self, imp: Impl) -> Option<usize> {
        self.impls.iter().position(|i| *i == imp)
    }

    /// Median throughput over rounds of configuration `ci`, implementation `ii`.
    fn median_rate(&self, ci: usize, ii: usize) -> f64 {
        median(
            self.rounds[ci][ii]
                .iter()
                .map(|r| r.samples_per_second)
                .collect(),
        )
    }

    /// Median over rounds of the throughput ratio a / b measured within
    /// each round.
    fn paired_ratio(&self, ci: usize, a: usize, b: usize) -> f64 {
        median(
            self.rounds[ci][a]
                .iter()
                .zip(&self.rounds[ci][b])
                .map(|(x, y)| x.samples_per_second / y.samples_per_second)
                .collect(),
        )
    }

    fn median_losses(&self, ci: usize) -> Vec<f64> {
        (0..self.impls.len())
            .map(|ii| median(self.rounds[ci][ii].iter().map(|r| r.final_loss).collect()))
            .collect()
    }
}

/// Run the benchmark; Ok(false) when the final losses disagree.
pub fn run(args: &[String]) -> Result<bool> {
    let o = parse_options(args)?;
    let root = crate::workspace_root();
    let work = target_dir(&root).join("bench");
    std::fs::create_dir_all(&work).with_context(|| format!("creating {}", work.display()))?;
    let data = work.join("mass-spring.csv");
    write_file(&data, &mass_spring_csv())?;
    let tools = prepare_tools(&root, &work, &data, &o)?;
    let cpus = std::thread::available_parallelism().map_or(1, |n| n.get());
    let thread_counts: Vec<usize> = [1, 2].into_iter().filter(|t| *t <= cpus).collect();
    let configs = configurations(&thread_counts);
    let cpu = cpu_info();
    print_machine(&cpu, cpus, &data, &o, tools.taskset);
    let measured = Measured {
        configs: &configs,
        impls: &o.impls,
        rounds: measure_rounds(&tools, &root, &work, &data, &o, &configs)?,
    };
    println!();
    let agree = print_throughput_and_losses(&measured);
    if thread_counts.len() == 2 {
        print_scaling(&measured);
    }
    if let Some(k) = measured.position(Impl::Visviva) {
        print_flops(&measured, k, &cpu);
    }
    if o.impls.contains(&Impl::Visviva) && o.large_samples > 0 {
        crate::bench_large::run(&tools.visviva, &work, o.large_samples, cpus)?;
    }
    if !agree {
        println!("final losses disagree by more than a factor of 2: the comparison is not valid");
    }
    Ok(agree)
}

/// The trainer binary, the reference implementations' Python (only when
/// one is compared), CPU pinning, and the shared initial weights.
fn prepare_tools(root: &Path, work: &Path, data: &Path, o: &Options) -> Result<Tools> {
    let needs_python = o.impls.iter().any(|i| *i != Impl::Visviva);
    let mut tools = Tools {
        visviva: build_visviva(root)?,
        python: if needs_python {
            Some(ensure_venv(root)?)
        } else {
            None
        },
        taskset: Command::new("taskset")
            .args(["-c", "0", "true"])
            .status()
            .is_ok_and(|s| s.success()),
        init: None,
    };
    tools.init = Some(write_initial_weights(&tools, work, data)?);
    Ok(tools)
}

/// Every batch size with every thread count.
fn configurations(thread_counts: &[usize]) -> Vec<Config> {
    BATCHES
        .into_iter()
        .flat_map(|batch| {
            thread_counts
                .iter()
                .map(move |&threads| Config { batch, threads })
        })
        .collect()
}

fn print_machine(cpu: &Cpu, cpus: usize, data: &Path, o: &Options, taskset: bool) {
    println!(
        "machine: {} CPUs, {} at {:.0} MHz; {}; data {} ({} x {} samples); {} rounds of {} steps",
        cpus,
        cpu.model,
        cpu.mhz,
        shell_line("date", &["-u", "+%Y-%m-%d %H:%M UTC"]),
        data.display(),
        TRAJECTORIES,
        SAMPLES,
        o.rounds,
        o.steps
    );
    if !taskset {
        println!("note: taskset not available; runs are not pinned to CPUs");
    }
}

/// All rounds; within a round every configuration runs every
/// implementation, the order rotated per round so none always runs first.
fn measure_rounds(
    tools: &Tools,
    root: &Path,
    work: &Path,
    data: &Path,
    o: &Options,
    configs: &[Config],
) -> Result<Vec<Vec<Vec<RunResult>>>> {
    let ni = o.impls.len();
    let mut results: Vec<Vec<Vec<RunResult>>> = vec![vec![Vec::new(); ni]; configs.len()];
    for round in 0..o.rounds {
        for (ci, cfg) in configs.iter().enumerate() {
            for j in 0..ni {
                let ii = (j + round) % ni;
                let imp = o.impls[ii];
                let r = run_one(tools, root, work, data, imp, *cfg, o.steps)?;
                println!(
                    "  round {} {} {}: {:.0} samples/s, final loss {:.3e}",
                    round + 1,
                    cfg.label(),
                    imp.name(),
                    r.samples_per_second,
                    r.final_loss
                );
                results[ci][ii].push(r);
            }
        }
    }
    Ok(results)
}

/// One `train` line (throughput and paired ratios) and one final-loss line
/// per configuration; false when some configuration's losses disagree.
fn print_throughput_and_losses(m: &Measured<'_>) -> bool {
    let mut agree = true;
    for (ci, cfg) in m.configs.iter().enumerate() {
        println!(
            "train {}:{}",
            cfg.label(),
            throughput_parts(m, ci).join(",")
        );
        let losses = m.median_losses(ci);
        let lo = losses.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = losses.iter().copied().fold(0.0, f64::max);
        let ok = lo.is_finite() && hi.is_finite() && lo > 0.0 && hi <= 2.0 * lo;
        agree &= ok;
        println!(
            "  final loss (all 4096 samples, median): {} -> {}",
            m.impls
                .iter()
                .zip(&losses)
                .map(|(i, l)| format!("{} {l:.3e}", i.name()))
                .collect::<Vec<_>>()
                .join(", "),
            if ok {
                "agree within a factor of 2"
            } else {
                "DISAGREE (more than a factor of 2 apart)"
            }
        );
    }
    agree
}

/// Each implementation's median throughput, then visviva's paired ratio
/// against each reference.
fn throughput_parts(m: &Measured<'_>, ci: usize) -> Vec<String> {
    let mut parts: Vec<String> = m
        .impls
        .iter()
        .enumerate()
        .map(|(ii, imp)| {
            if *imp == Impl::Visviva {
                format!(" {} {:.0} samples/s", imp.name(), m.median_rate(ci, ii))
            } else {
                format!(" {} {:.0}", imp.name(), m.median_rate(ci, ii))
            }
        })
        .collect();
    if let Some(k) = m.position(Impl::Visviva) {
        for other in [Impl::Torch, Impl::Jax] {
            if let Some(x) = m.position(other) {
                parts.push(format!(
                    " visviva/{} {:.2}",
                    other.name(),
                    m.paired_ratio(ci, k, x)
                ));
            }
        }
    }
    parts
}

/// Per batch size: 2-thread over 1-thread throughput of every implementation.
fn print_scaling(m: &Measured<'_>) {
    for batch in BATCHES {
        let find = |threads| {
            m.configs
                .iter()
                .position(|c| c.batch == batch && c.threads == threads)
        };
        let (Some(one), Some(two)) = (find(1), find(2)) else {
            continue;
        };
        let ratios: Vec<String> = m
            .impls
            .iter()
            .enumerate()
            .map(|(ii, imp)| {
                format!(
                    "{} {:.2}",
                    imp.name(),
                    m.median_rate(two, ii) / m.median_rate(one, ii)
                )
            })
            .collect();
        println!(
            "scaling batch {batch}: 2-thread / 1-thread throughput: {}",
            ratios.join(", ")
        );
    }
}

/// The FLOP count per sample, the assumed peak, and the achieved GFLOP/s of
/// visviva (implementation `k`) per configuration.
fn print_flops(m: &Measured<'_>, k: usize, cpu: &Cpu) {
    let mut sizes = vec![2];
    sizes.extend_from_slice(&HIDDEN);
    sizes.push(1);
    let (per_sample, per_step) = flops_per_sample(&sizes);
    // Peak per core: vector lanes x 2 (fused multiply-add) x 2 FMA units
    // per core (common practice for recent x86 server cores; an
    // assumption, not measured). The trainer's products run on its widest
    // kernel the CPU allows (`trainer/src/learn/product.rs`): AVX-512 or
    // AVX2 + FMA.
    let lanes = if cpu.avx512 {
        16.0
    } else if cpu.avx2 {
        8.0
    } else {
        4.0
    };
    let fma = if cpu.fma { 2.0 } else { 1.0 };
    let peak = cpu.mhz / 1000.0 * lanes * fma * 2.0;
    println!(
        "flops: visviva step = {per_sample:.0} FLOP per sample + {per_step:.0} FLOP per step \
         (Adam, clipping); peak assumption {peak:.1} GFLOP/s per core = {:.2} GHz x {} f32 \
         lanes ({}) x {} (FMA) x 2 FMA units",
        cpu.mhz / 1000.0,
        lanes,
        if cpu.avx512 {
            "AVX-512, the trainer's product kernel"
        } else if cpu.avx2 {
            "AVX2"
        } else {
            "SSE"
        },
        fma,
    );
    for (ci, cfg) in m.configs.iter().enumerate() {
        let rate = m.median_rate(ci, k);
        let gflops = rate * (per_sample + per_step / cfg.batch as f64) / 1e9;
        let cores_peak = peak * cfg.threads as f64;
        println!(
            "flops {}: visviva {gflops:.2} GFLOP/s achieved of {cores_peak:.1} peak ({:.1} %)",
            cfg.label(),
            100.0 * gflops / cores_peak
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand count for 2-64-64-1 (see net.rs): the matrix products are three
    /// passes of 2*64 + 64*64 + 64 = 4288 multiply-adds plus the reverse
    /// pass's 64 + 3*4096 + 2*128 = 12608, i.e. 25472 multiply-adds.
    #[test]
    fn flop_count_matches_hand_count_of_matrix_products() {
        let (per_sample, per_step) = flops_per_sample(&[2, 64, 64, 1]);
        let matrix = 2.0 * 25472.0;
        let elementwise = per_sample - matrix;
        // forward 129 + 640, input gradient 128, tangent 128, reverse
        // 128 + 512, loss 14.
        assert_eq!(
            elementwise,
            129.0 + 640.0 + 128.0 + 128.0 + 128.0 + 512.0 + 14.0
        );
        // 4417 parameters (2*64+64 + 64*64+64 + 64+1), 16 operations each.
        assert_eq!(per_step, 4417.0 * 16.0);
    }

    /// The log is the textbook solution: energy (q^2 + p^2) / 2 is constant
    /// along each trajectory and the derivatives are (p, -q).
    #[test]
    fn mass_spring_log_follows_the_closed_form() {
        let csv = mass_spring_csv();
        let mut lines = csv.lines();
        assert_eq!(lines.next(), Some("traj,t,q1,p1,dq1,dp1"));
        let rows: Vec<Vec<f64>> = lines
            .map(|l| l.split(',').map(|v| v.parse().unwrap()).collect())
            .collect();
        assert_eq!(rows.len(), TRAJECTORIES * SAMPLES);
        for traj in rows.chunks(SAMPLES) {
            let r2 = traj[0][2].powi(2) + traj[0][3].powi(2);
            assert!((0.04..=1.0).contains(&r2));
            for row in traj {
                assert!((row[2].powi(2) + row[3].powi(2) - r2).abs() < 1e-12);
                assert_eq!(row[4], row[3]);
                assert_eq!(row[5], -row[2]);
            }
        }
    }

    #[test]
    fn reads_numbers_from_our_summaries() {
        let text = "{\n  \"samples_per_second\": 12345.5,\n  \"final_train_loss\": 1.5e-05\n}";
        assert_eq!(json_number(text, "samples_per_second"), Some(12345.5));
        assert_eq!(json_number(text, "final_train_loss"), Some(1.5e-5));
        assert_eq!(json_number(text, "missing"), None);
    }
}
