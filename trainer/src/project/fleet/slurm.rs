//! The fleet as a Slurm job array: the batch script (one array task per
//! unit, resources from `[slurm]`), the frozen index -> unit list the tasks
//! read (`out/fleet-units.txt`), and the submission through `sbatch` from
//! PATH. Slurm distributes, retries and accounts; Visviva only describes
//! the work, and every task writes its results beside its unit.

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{anyhow, bail, Context, Result};

use crate::atomic::write_atomic;
use crate::project::fleet::file::Fleet;

/// The frozen unit list (`index<TAB>unit folder`, one line per array task).
pub const UNITS_FILE: &str = "fleet-units.txt";
/// The batch script.
pub const SCRIPT_FILE: &str = "fleet-job.sh";
/// The last submission (`job id`, Unix time), for `fleet status`.
pub const SUBMIT_FILE: &str = "fleet-submit.txt";

/// Single-quote `s` for the shell.
fn quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', r"'\''"))
}

fn absolute(p: &Path) -> Result<PathBuf> {
    std::fs::canonicalize(p).with_context(|| format!("{}: cannot resolve", p.display()))
}

/// The batch script for `exe` (the `visviva` binary, as seen from the
/// compute nodes) over the fleet at `dir` (absolute).
pub fn script(fleet: &Fleet, exe: &Path, dir: &Path) -> String {
    let r = &fleet.file.slurm;
    let n = fleet.units.len();
    let mut s = String::from("#!/bin/bash\n");
    s.push_str(&format!(
        "#SBATCH --job-name=visviva-fleet\n#SBATCH --array=0-{}\n",
        n.saturating_sub(1)
    ));
    s.push_str(&format!(
        "#SBATCH --ntasks=1\n#SBATCH --cpus-per-task={}\n#SBATCH --mem={}\n#SBATCH --time={}\n",
        r.cpus, r.memory, r.time_limit
    ));
    if let Some(p) = &r.partition {
        s.push_str(&format!("#SBATCH --partition={p}\n"));
    }
    for e in &r.extra {
        s.push_str(&format!("#SBATCH {e}\n"));
    }
    // Slurm's own log of the task, until the script sends its output beside
    // the unit.
    let log = dir.join("out").join("slurm").join("%A_%a.out");
    s.push_str(&format!("#SBATCH --output={}\n", log.display()));
    s.push_str("# Written by visviva fleet submit: one array task per unit.\n");
    s.push_str("# Array task index -> unit (the same list is in out/fleet-units.txt):\n");
    for (i, u) in fleet.units.iter().enumerate() {
        s.push_str(&format!("#   {i} {}\n", u.name));
    }
    s.push_str("set -eu\n");
    s.push_str(
        "# The task's own log goes beside its unit: <unit>/out/slurm-task.log.\nUNIT_DIRS=(",
    );
    for u in &fleet.units {
        let d = std::fs::canonicalize(&u.dir).unwrap_or_else(|_| u.dir.clone());
        s.push_str(&format!("\n  {}", quote(&d.display().to_string())));
    }
    s.push_str("\n)\nUNIT_DIR=\"${UNIT_DIRS[$SLURM_ARRAY_TASK_ID]}\"\n");
    s.push_str("mkdir -p \"$UNIT_DIR/out\"\nexec >\"$UNIT_DIR/out/slurm-task.log\" 2>&1\n");
    s.push_str(&format!(
        "exec {} fleet task {} --index \"$SLURM_ARRAY_TASK_ID\"\n",
        quote(&exe.display().to_string()),
        quote(&dir.display().to_string())
    ));
    s
}

/// The frozen index -> unit list.
pub fn units_text(fleet: &Fleet) -> String {
    fleet
        .units
        .iter()
        .enumerate()
        .map(|(i, u)| format!("{i}\t{}\n", u.name))
        .collect()
}

/// The unit name of array task `index`, from the list written at submission.
pub fn unit_of_index(out: &Path, index: usize) -> Result<String> {
    let path = out.join(UNITS_FILE);
    let text = std::fs::read_to_string(&path)
        .with_context(|| format!("{}: cannot read (run fleet submit first)", path.display()))?;
    for (n, line) in text.lines().enumerate() {
        let (i, name) = line.split_once('\t').ok_or_else(|| {
            anyhow!(
                "{}: line {}: expected INDEX<TAB>UNIT",
                path.display(),
                n + 1
            )
        })?;
        if i.parse::<usize>().ok() == Some(index) {
            return Ok(name.to_string());
        }
    }
    bail!("{}: no array task index {index}", path.display())
}

/// Write the script and the unit list into `out/`; with `submit`, hand the
/// script to `sbatch --parsable` and return the job id.
pub fn submit(fleet: &Fleet, submit: bool) -> Result<(PathBuf, Option<String>)> {
    if fleet.units.is_empty() {
        bail!("the fleet has no units");
    }
    let dir = absolute(&fleet.dir)?;
    let out = dir.join("out");
    std::fs::create_dir_all(out.join("slurm"))
        .with_context(|| format!("{}: cannot create", out.display()))?;
    let exe = std::env::current_exe().context("finding the visviva binary")?;
    let path = out.join(SCRIPT_FILE);
    write_atomic(&out.join(UNITS_FILE), units_text(fleet).as_bytes())?;
    write_atomic(&path, script(fleet, &exe, &dir).as_bytes())?;
    if !submit {
        return Ok((path, None));
    }
    let o = Command::new("sbatch")
        .arg("--parsable")
        .arg(&path)
        .current_dir(&dir)
        .output()
        .context("starting sbatch (is Slurm's sbatch on PATH?)")?;
    if !o.status.success() {
        bail!(
            "sbatch {} failed ({}): {}",
            path.display(),
            o.status,
            String::from_utf8_lossy(&o.stderr).trim()
        );
    }
    let text = String::from_utf8_lossy(&o.stdout);
    let id = text.trim().split(';').next().unwrap_or("").to_string();
    if id.is_empty() || !id.chars().all(|c| c.is_ascii_digit()) {
        bail!("sbatch printed no job id: {text:?}");
    }
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    write_atomic(&out.join(SUBMIT_FILE), format!("{id}\t{now}\n").as_bytes())?;
    Ok((path, Some(id)))
}

/// The last submission's (job id, Unix time), if any.
pub fn last_submit(out: &Path) -> Option<(String, u64)> {
    let text = std::fs::read_to_string(out.join(SUBMIT_FILE)).ok()?;
    let (id, t) = text.trim().split_once('\t')?;
    Some((id.to_string(), t.parse().ok()?))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shell_quoting_survives_quotes() {
        assert_eq!(quote("/a b/it's"), r"'/a b/it'\''s'");
    }
}
