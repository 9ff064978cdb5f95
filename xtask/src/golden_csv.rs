//! Golden rollouts written by `visviva run` next to an exported blob
//! (`<dir>/golden/<blob stem>-<k>.csv`, columns `t,q1..qn,p1..pn`; a
//! `visviva rollout` file adds `v1..vn`, read and dropped), values as
//! `0x`-prefixed `f32` bit patterns or decimal numbers). When present they
//! supply the device check's initial states and step count, and serve as a
//! second reference beside the in-process rollout. A driven model's golden
//! rollouts replay one input sequence, kept beside them as
//! `<dir>/golden/<blob stem>-inputs.csv` (columns `t,u1..um`, row k held
//! over step k); it becomes the run plan's inputs.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};

use crate::host_rollout::Trajectories;
use crate::run_plan::RunPlan;

/// The golden files of `blob`, in order k = 0, 1, ...
pub fn files_for(blob: &Path) -> Vec<PathBuf> {
    let (Some(dir), Some(stem)) = (blob.parent(), blob.file_stem()) else {
        return Vec::new();
    };
    let stem = stem.to_string_lossy();
    (0..)
        .map(|k| dir.join("golden").join(format!("{stem}-{k}.csv")))
        .take_while(|p| p.is_file())
        .collect()
}

/// The input sequence of `blob`'s golden rollouts, when it has one.
pub fn inputs_file_for(blob: &Path) -> Option<PathBuf> {
    let (dir, stem) = (blob.parent()?, blob.file_stem()?);
    let path = dir
        .join("golden")
        .join(format!("{}-inputs.csv", stem.to_string_lossy()));
    path.is_file().then_some(path)
}

/// A table of `0x`-hex bit patterns or decimal numbers under a header that
/// `header_ok` accepts (`expected` describes it in the error): the header
/// (its names) and every row's bit patterns, the first (`t`) column
/// dropped. Errors
/// name the file, line and column.
fn read_table(
    path: &Path,
    header_ok: impl Fn(&[&str]) -> bool,
    expected: &str,
) -> Result<(Vec<String>, Vec<Vec<u32>>)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines
        .next()
        .with_context(|| format!("{}: empty file", path.display()))?
        .split(',')
        .collect();
    let columns = header.len();
    if columns < 2 || header[0] != "t" || !header_ok(&header) {
        bail!(
            "{}:1: header `{}` is not `{expected}`",
            path.display(),
            header.join(",")
        );
    }
    let mut rows = Vec::new();
    for (i, line) in lines.enumerate() {
        let fields: Vec<&str> = line.split(',').collect();
        if fields.len() != columns {
            bail!(
                "{}:{}: {} fields, the header has {columns}",
                path.display(),
                i + 2,
                fields.len()
            );
        }
        let mut row = Vec::with_capacity(columns - 1);
        for (c, f) in fields.iter().enumerate().skip(1) {
            let v = parse_value(f.trim()).with_context(|| {
                format!(
                    "{}:{}: column `{}`: `{f}` is neither 0x-hex bits nor a number",
                    path.display(),
                    i + 2,
                    header[c]
                )
            })?;
            row.push(v);
        }
        rows.push(row);
    }
    Ok((header.iter().map(|c| c.to_string()).collect(), rows))
}

/// An input sequence file: one row of m values per step (the `t` column
/// dropped). Errors name the file, line and column.
pub fn read_inputs(path: &Path) -> Result<Vec<Vec<f32>>> {
    let inputs_header = |h: &[&str]| {
        h[1..]
            .iter()
            .enumerate()
            .all(|(i, c)| *c == format!("u{}", i + 1))
    };
    let (_, rows) = read_table(path, inputs_header, "t,u1..um")?;
    Ok(rows
        .into_iter()
        .map(|r| r.into_iter().map(f32::from_bits).collect())
        .collect())
}

fn parse_value(text: &str) -> Option<u32> {
    match text.strip_prefix("0x") {
        Some(hex) => u32::from_str_radix(hex, 16).ok(),
        None => text.parse::<f32>().ok().map(f32::to_bits),
    }
}

/// Whether `h` is `t,q1..qn,p1..pn` (golden files) or
/// `t,q1..qn,p1..pn,v1..vn` (`visviva rollout`, velocities after the
/// state); the dof when it is.
fn states_dof(h: &[&str]) -> Option<usize> {
    let names = |n: usize, kinds: &[&str]| -> Vec<String> {
        let mut v = vec!["t".to_string()];
        for k in kinds {
            v.extend((1..=n).map(|i| format!("{k}{i}")));
        }
        v
    };
    let h: Vec<String> = h.iter().map(|c| c.trim().to_string()).collect();
    let c = h.len().checked_sub(1)?;
    [(2, &["q", "p"][..]), (3, &["q", "p", "v"][..])]
        .into_iter()
        .filter(|(k, _)| c > 0 && c % k == 0)
        .find(|(k, kinds)| h == names(c / k, kinds))
        .map(|(k, _)| c / k)
}

/// One file: the dof and every row's state bit patterns (the `t` column
/// and any velocity columns dropped).
pub fn read_one(path: &Path) -> Result<(usize, Vec<Vec<u32>>)> {
    let states_header = |h: &[&str]| states_dof(h).is_some();
    let (header, mut rows) = read_table(path, states_header, "t,q1..qn,p1..pn[,v1..vn]")?;
    if rows.is_empty() {
        bail!("{}: no rows", path.display());
    }
    let h: Vec<&str> = header.iter().map(String::as_str).collect();
    let n = states_dof(&h).context("header checked")?;
    rows.iter_mut().for_each(|r| r.truncate(2 * n));
    Ok((n, rows))
}

/// Read all golden files of a blob and, for a driven model, their input
/// sequence: the run plan they imply and their states.
pub fn read(files: &[PathBuf], inputs: Option<&Path>) -> Result<(RunPlan, Trajectories)> {
    let mut dof = 0;
    let mut steps = None;
    let mut trajectories = Vec::new();
    for path in files {
        let (n, rows) = read_one(path)?;
        let k = rows.len() as u32 - 1;
        if *steps.get_or_insert(k) != k || (dof != 0 && dof != n) {
            bail!(
                "{}: {k} steps of {n} dof, unlike the other golden files",
                path.display()
            );
        }
        dof = n;
        trajectories.push(rows);
    }
    let steps = steps.context("no golden files")?;
    let inputs = match inputs {
        Some(path) => {
            let rows = read_inputs(path)?;
            if rows.len() != steps as usize {
                bail!(
                    "{}: {} input rows, the golden rollouts take {steps} steps",
                    path.display(),
                    rows.len()
                );
            }
            rows
        }
        None => Vec::new(),
    };
    let plan = RunPlan {
        dof,
        steps,
        initial_states: trajectories
            .iter()
            .map(|t| t[0].iter().map(|b| f32::from_bits(*b)).collect())
            .collect(),
        inputs,
    };
    Ok((plan, trajectories))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_and_decimal_cells_give_ieee754_bits() {
        // IEEE 754 binary32: 0.5 = 0x3F00_0000, -1.5 = 0xBFC0_0000.
        assert_eq!(parse_value("0x3f000000"), Some(0x3F00_0000));
        assert_eq!(parse_value("-1.5"), Some(0xBFC0_0000));
        assert_eq!(parse_value("nope"), None);
    }

    #[test]
    fn velocity_columns_are_dropped_and_the_header_decides_the_dof() {
        let dir = std::env::temp_dir().join(format!("xtask-golden-v-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        // Six value columns: two dof with velocities, or three without.
        let (with_v, without_v) = (dir.join("v.csv"), dir.join("s.csv"));
        std::fs::write(&with_v, "t,q1,q2,p1,p2,v1,v2\n0,1,2,3,4,5,6\n").unwrap();
        std::fs::write(&without_v, "t,q1,q2,q3,p1,p2,p3\n0,1,2,3,4,5,6\n").unwrap();
        let (n, rows) = read_one(&with_v).unwrap();
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!((n, rows[0].clone()), (2, bits(&[1.0, 2.0, 3.0, 4.0])));
        let (n, rows) = read_one(&without_v).unwrap();
        assert_eq!((n, rows[0].len()), (3, 6));
        std::fs::write(&with_v, "t,q1,p1,v2\n0,1,2,3\n").unwrap();
        assert!(read_one(&with_v).is_err());
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn a_bad_cell_names_file_line_and_column() {
        let dir = std::env::temp_dir().join(format!("xtask-golden-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("m-0.csv");
        std::fs::write(&path, "t,q1,p1\n0,0x3f000000,0x0\n0.1,0x3f000000,oops\n").unwrap();
        let err = format!("{:#}", read_one(&path).unwrap_err());
        std::fs::remove_dir_all(&dir).ok();
        assert!(err.contains("m-0.csv:3"), "{err}");
        assert!(err.contains("column `p1`"), "{err}");
    }

    #[test]
    fn a_driven_golden_set_carries_its_inputs_into_the_plan() {
        let dir = std::env::temp_dir().join(format!("xtask-golden-u-{}", std::process::id()));
        std::fs::create_dir_all(dir.join("golden")).unwrap();
        let blob = dir.join("m.vvb");
        std::fs::write(&blob, b"").unwrap();
        std::fs::write(
            dir.join("golden/m-0.csv"),
            "t,q1,p1\n0,0x3f000000,0x0\n0.1,0x3f000000,0x0\n0.2,0x3f000000,0x0\n",
        )
        .unwrap();
        // IEEE 754 binary32: -1.5 = 0xBFC0_0000; 0.1 as shortest decimal.
        std::fs::write(dir.join("golden/m-inputs.csv"), "t,u1\n0,-1.5\n0.1,0.1\n").unwrap();
        let files = files_for(&blob);
        let inputs = inputs_file_for(&blob);
        let (plan, states) = read(&files, inputs.as_deref()).unwrap();
        std::fs::write(dir.join("golden/m-inputs.csv"), "t,u1\n0,-1.5\n").unwrap();
        let short = format!("{:#}", read(&files, inputs.as_deref()).unwrap_err());
        std::fs::write(dir.join("golden/m-inputs.csv"), "t,u2\n0,1\n0,1\n").unwrap();
        let bad_header = format!("{:#}", read(&files, inputs.as_deref()).unwrap_err());
        std::fs::remove_dir_all(&dir).ok();
        assert_eq!(files.len(), 1, "the inputs file is not a rollout");
        assert_eq!(plan.steps, 2);
        assert_eq!(states[0].len(), 3);
        assert_eq!(plan.inputs.len(), 2);
        assert_eq!(plan.inputs[0][0].to_bits(), 0xBFC0_0000);
        assert_eq!(plan.inputs[1][0], 0.1f32);
        assert!(
            short.contains("1 input rows") && short.contains("2 steps"),
            "{short}"
        );
        assert!(bad_header.contains("m-inputs.csv:1"), "{bad_header}");
    }
}
