//! Golden rollouts written by `keel run` next to an exported blob
//! (`<dir>/golden/<blob stem>-<k>.csv`, columns `t,q1..qn,p1..pn`, values as
//! `0x`-prefixed `f32` bit patterns or decimal numbers). When present they
//! supply the device check's initial states and step count, and serve as a
//! second reference beside the in-process rollout.

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

fn parse_value(text: &str) -> Option<u32> {
    match text.strip_prefix("0x") {
        Some(hex) => u32::from_str_radix(hex, 16).ok(),
        None => text.parse::<f32>().ok().map(f32::to_bits),
    }
}

/// One file: the dof and every row's bit patterns (the `t` column dropped).
pub fn read_one(path: &Path) -> Result<(usize, Vec<Vec<u32>>)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines
        .next()
        .with_context(|| format!("{}: empty file", path.display()))?
        .split(',')
        .collect();
    let columns = header.len();
    if columns < 3 || columns.is_multiple_of(2) || header[0] != "t" {
        bail!(
            "{}:1: header `{}` is not `t,q1..qn,p1..pn`",
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
    if rows.is_empty() {
        bail!("{}: no rows", path.display());
    }
    Ok(((columns - 1) / 2, rows))
}

/// Read all golden files of a blob: the run plan they imply and their states.
pub fn read(files: &[PathBuf]) -> Result<(RunPlan, Trajectories)> {
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
    let plan = RunPlan {
        dof,
        steps: steps.context("no golden files")?,
        initial_states: trajectories
            .iter()
            .map(|t| t[0].iter().map(|b| f32::from_bits(*b)).collect())
            .collect(),
        inputs: Vec::new(),
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
}
