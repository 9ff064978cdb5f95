//! `visviva compare`: two trajectory CSVs, value by value — bit for bit by
//! default, or within a relative tolerance — naming the first difference.
//! Exit status 1 on a mismatch, 2 on unreadable input.

use std::path::PathBuf;

use anyhow::{bail, Result};

use crate::deploy::compare::{compare, Verdict};

/// Arguments of `visviva compare`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// First CSV (e.g. the host rollout).
    #[arg(value_name = "A.csv")]
    pub a: PathBuf,
    /// Second CSV (e.g. the device's).
    #[arg(value_name = "B.csv")]
    pub b: PathBuf,
    /// Require identical bits (the default).
    #[arg(long, conflicts_with = "rel")]
    pub bits: bool,
    /// Accept |a - b| <= REL * max(|a|, |b|) instead of identical bits.
    #[arg(long, value_name = "REL")]
    pub rel: Option<f64>,
}

/// Run the command; `Ok(false)` means the files differ.
pub fn run(args: Args) -> Result<bool> {
    if let Some(t) = args.rel {
        if !(t.is_finite() && t >= 0.0) {
            bail!("--rel must be a finite number >= 0");
        }
    }
    match compare(&args.a, &args.b, args.rel)? {
        Verdict::Same { rows } => {
            let how = match args.rel {
                None => "bit-identical".to_string(),
                Some(t) => format!("equal within relative {t:e}"),
            };
            println!("{rows} rows {how}");
            Ok(true)
        }
        Verdict::Differs { step, column, a, b } => {
            println!("first difference at step {step}, column {column}: {a} vs {b}");
            Ok(false)
        }
    }
}
