//! The benchmark's large-log line: a 10-million-sample log (100
//! trajectories x 100,000 samples of a two-degree-of-freedom mass-spring
//! chain, exact solution, values written at f32 precision as a rig would log
//! them) in the canonical CSV layout, fitted by `visviva fit` for a few
//! hundred optimizer steps. Printed: the load time and rows/s (the trainer's
//! own `read ...` line), the fit time (its `energy model: ...` line) and the
//! fit's peak resident size against the f32 size of the data, taken as the
//! eight state and derivative columns q1 q2 p1 p2 dq1 dq2 dp1 dp2 (time and
//! trajectory id not counted). The peak comes from getrusage(RUSAGE_CHILDREN)
//! in a fresh `cargo xtask peak-rss` process whose only child is the fit, so
//! no earlier child (cargo, rustc, other fits) counts.

use std::fmt::Write as _;
use std::io::Write as _;
use std::path::Path;
use std::process::Command;

use anyhow::{bail, Context, Result};
use visviva_blob_support::{Generator, SplitMix64};

/// Trajectories in the large log.
pub const TRAJECTORIES: usize = 100;
/// Samples per trajectory by default (`--large-samples`).
pub const SAMPLES: usize = 100_000;
/// Sample spacing (s): samples are at t = k / RATE.
const RATE: f64 = 100.0;
/// Optimizer steps of the fit.
const STEPS: usize = 300;
/// Minibatch of the fit.
const BATCH: usize = 1024;
/// f32 values per sample in "the data": q1 q2 p1 p2 dq1 dq2 dp1 dp2.
const VALUES_PER_SAMPLE: usize = 8;

/// One sample of the chain wall - m - m - wall with unit masses and unit
/// springs, H = (p1^2 + p2^2)/2 + (q1^2 + (q2 - q1)^2 + q2^2)/2: normal
/// modes (1, 1)/sqrt 2 at angular frequency 1 and (1, -1)/sqrt 2 at sqrt 3
/// (textbook result for two coupled oscillators), amplitudes `a`, `b`,
/// phases `pa`, `pb`. Returns (q1, q2, p1, p2, dq1, dq2, dp1, dp2).
pub fn chain_sample(t: f64, a: f64, b: f64, pa: f64, pb: f64) -> [f64; 8] {
    let w2 = 3f64.sqrt();
    let r = std::f64::consts::FRAC_1_SQRT_2;
    let (s1, c1) = (t + pa).sin_cos();
    let (s2, c2) = (w2 * t + pb).sin_cos();
    let q1 = r * (a * c1 + b * c2);
    let q2 = r * (a * c1 - b * c2);
    let p1 = r * (-a * s1 - w2 * b * s2);
    let p2 = r * (-a * s1 + w2 * b * s2);
    [q1, q2, p1, p2, p1, p2, -(2.0 * q1 - q2), -(2.0 * q2 - q1)]
}

/// Write the log (`samples` per trajectory) to `path` as it is generated.
pub fn write_log(path: &Path, samples: usize) -> Result<()> {
    let file =
        std::fs::File::create(path).with_context(|| format!("creating {}", path.display()))?;
    let mut w = std::io::BufWriter::with_capacity(1 << 20, file);
    writeln!(w, "traj,t,q1,q2,p1,p2,dq1,dq2,dp1,dp2")?;
    let mut rng = SplitMix64(0x6269_676c_6f67_0001);
    let mut line = String::with_capacity(160);
    for traj in 0..TRAJECTORIES {
        let a = 0.2 + 0.8 * rng.uniform(0.0, 1.0);
        let b = 0.2 + 0.8 * rng.uniform(0.0, 1.0);
        let pa = std::f64::consts::TAU * rng.uniform(0.0, 1.0);
        let pb = std::f64::consts::TAU * rng.uniform(0.0, 1.0);
        for k in 0..samples {
            let t = k as f64 / RATE;
            line.clear();
            let _ = write!(line, "{traj},{t}");
            for v in chain_sample(t, a, b, pa, pb) {
                let _ = write!(line, ",{}", v as f32);
            }
            line.push('\n');
            w.write_all(line.as_bytes())?;
        }
    }
    w.flush()?;
    Ok(())
}

/// `cargo xtask peak-rss PROGRAM ARGS..`: run the program (output passed
/// through) and print `peak-rss-kb N`, its peak resident size.
pub fn peak_rss(args: &[String]) -> Result<bool> {
    let Some((program, rest)) = args.split_first() else {
        bail!("usage: cargo xtask peak-rss PROGRAM [ARGS..]");
    };
    let status = Command::new(program)
        .args(rest)
        .status()
        .with_context(|| format!("starting {program}"))?;
    println!("peak-rss-kb {}", children_peak_kb());
    Ok(status.success())
}

#[cfg(unix)]
fn children_peak_kb() -> i64 {
    use nix::sys::resource::{getrusage, UsageWho};
    // Linux reports ru_maxrss in kilobytes.
    getrusage(UsageWho::RUSAGE_CHILDREN).map_or(-1, |u| u.max_rss())
}

#[cfg(not(unix))]
fn children_peak_kb() -> i64 {
    -1
}

/// The number after `prefix` in the first line of `text` that holds it.
fn number_after(text: &str, prefix: &str) -> Option<f64> {
    let at = text.find(prefix)? + prefix.len();
    let rest = &text[at..];
    let end = rest
        .find(|c: char| !(c.is_ascii_digit() || ".eE+-".contains(c)))
        .unwrap_or(rest.len());
    rest[..end].parse().ok()
}

/// Generate the log, fit it on `threads` threads, print the line.
pub fn run(visviva: &Path, work: &Path, samples: usize, threads: usize) -> Result<()> {
    let data = work.join("large-log.csv");
    let started = std::time::Instant::now();
    write_log(&data, samples)?;
    let bytes = std::fs::metadata(&data).map_or(0, |m| m.len());
    println!(
        "large log: wrote {} ({:.0} MB) in {:.1} s",
        data.display(),
        bytes as f64 / 1e6,
        started.elapsed().as_secs_f64()
    );
    let model = work.join("large-model.vvb");
    let out = Command::new(std::env::current_exe().context("finding xtask itself")?)
        .arg("peak-rss")
        .arg(visviva)
        .args(["fit", "--data"])
        .arg(&data)
        .args([
            "--val-fraction",
            "0.1",
            "--arch",
            "general",
            "--hidden",
            "64,64",
        ])
        .args([
            "--batch",
            &BATCH.to_string(),
            "--optimizer-steps",
            &STEPS.to_string(),
        ])
        .args(["--lr", "1e-3", "--threads", &threads.to_string()])
        .args(["--no-early-stop", "--quiet", "--out"])
        .arg(&model)
        .output()
        .context("starting cargo xtask peak-rss")?;
    let _ = std::fs::remove_file(&data);
    let text = String::from_utf8_lossy(&out.stdout);
    if !out.status.success() {
        bail!(
            "large log fit failed ({}):\n{text}\n{}",
            out.status,
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let get = |prefix: &str| {
        number_after(&text, prefix).with_context(|| format!("no `{prefix}` in:\n{text}"))
    };
    let rows = get("read ")?;
    let load = get(&format!("from {} in ", data.display()))?;
    let fit = get(&format!(" x {BATCH} samples in "))?;
    let steps = get("energy model: ")?;
    let peak_mb = get("peak-rss-kb ")? / 1024.0;
    let data_mb = rows * (VALUES_PER_SAMPLE * 4) as f64 / (1024.0 * 1024.0);
    println!(
        "large log: {rows:.0} samples, load {load:.2} s ({:.0} rows/s), fit {fit:.2} s for \
         {steps:.0} steps (batch {BATCH}, {threads} threads, one validation pass over 10 % \
         of the trajectories included), peak RSS {peak_mb:.0} MiB (= {:.2} x the data's f32 \
         size, {data_mb:.0} MiB: {VALUES_PER_SAMPLE} f32 per sample)",
        rows / load.max(1e-9),
        peak_mb / data_mb
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The chain's energy (q1^2 + (q2 - q1)^2 + q2^2 + p1^2 + p2^2)/2 is
    /// constant along the closed-form solution, and the derivative columns
    /// are Hamilton's equations dq = p, dp = -K q.
    #[test]
    fn chain_samples_follow_the_closed_form() {
        let energy = |s: &[f64; 8]| {
            0.5 * (s[0] * s[0] + (s[1] - s[0]).powi(2) + s[1] * s[1] + s[2] * s[2] + s[3] * s[3])
        };
        let e0 = energy(&chain_sample(0.0, 0.7, 0.4, 1.0, 2.0));
        for k in 0..2000 {
            let s = chain_sample(k as f64 * 0.37, 0.7, 0.4, 1.0, 2.0);
            assert!((energy(&s) - e0).abs() < 1e-12 * e0.max(1.0));
            assert_eq!((s[4], s[5]), (s[2], s[3]));
            // dp/dt by central differences of p agrees with -K q.
            let h = 1e-5;
            let (a, b) = (
                chain_sample(k as f64 * 0.37 + h, 0.7, 0.4, 1.0, 2.0),
                chain_sample(k as f64 * 0.37 - h, 0.7, 0.4, 1.0, 2.0),
            );
            for i in 0..2 {
                let fd = (a[2 + i] - b[2 + i]) / (2.0 * h);
                assert!((fd - s[6 + i]).abs() < 1e-7, "{fd} vs {}", s[6 + i]);
            }
        }
    }

    #[test]
    fn reads_the_trainers_lines() {
        let text = "read 1000 samples from /x/large-log.csv in 0.50 s (2000 rows/s)\n\
                    fitting 900 samples in 9 trajectories (100 validation samples)\n\
                    energy model: 300 steps x 1024 samples in 12.34 s = 1 samples/s\n\
                    peak-rss-kb 2048\n";
        assert_eq!(number_after(text, "read "), Some(1000.0));
        assert_eq!(number_after(text, "from /x/large-log.csv in "), Some(0.5));
        assert_eq!(number_after(text, " x 1024 samples in "), Some(12.34));
        assert_eq!(number_after(text, "energy model: "), Some(300.0));
        assert_eq!(number_after(text, "peak-rss-kb "), Some(2048.0));
    }
}
