//! `cargo xtask demos [--verify]`: the demo projects in `models-demo/`,
//! regenerated reproducibly. Each project's logs come from `visviva simulate`
//! with the seeds listed here; `visviva run --force` then fits, checks and
//! exports. With `--verify` (what CI runs) the logs are regenerated into a
//! scratch folder and must equal the committed files byte for byte, and each
//! project is run twice and must produce identical blobs; the damped demos'
//! headline modes are asserted against closed forms (`demo_modes`).

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};

/// One simulated log of a demo project: file name and `visviva simulate` args.
type Log = (&'static str, &'static [&'static str]);

/// Demo projects and the commands that made their logs.
const DEMOS: &[(&str, &[Log])] = &[
    (
        "crane-sway",
        &[
            (
                "train.csv",
                &[
                    "--system",
                    "crane",
                    "--trajectories",
                    "20",
                    "--duration",
                    "10",
                    "--rate",
                    "20",
                    "--noise",
                    "0.002",
                    "--seed",
                    "11",
                ],
            ),
            (
                "val.csv",
                &[
                    "--system",
                    "crane",
                    "--trajectories",
                    "5",
                    "--duration",
                    "10",
                    "--rate",
                    "20",
                    "--noise",
                    "0.002",
                    "--seed",
                    "12",
                ],
            ),
            (
                "observe-healthy.csv",
                &[
                    "--system",
                    "crane",
                    "--trajectories",
                    "5",
                    "--duration",
                    "60",
                    "--rate",
                    "20",
                    "--position-noise",
                    "0.0019",
                    "--seed",
                    "13",
                ],
            ),
            (
                "observe-rope.csv",
                &[
                    "--system",
                    "crane",
                    "--trajectories",
                    "5",
                    "--duration",
                    "60",
                    "--rate",
                    "20",
                    "--position-noise",
                    "0.0019",
                    "--seed",
                    "13",
                    "--change",
                    "l=8.8",
                    "--change-at",
                    "30",
                ],
            ),
        ],
    ),
    (
        "flexure-sensor",
        &[
            (
                "train.csv",
                &[
                    "--system",
                    "flexure",
                    "--trajectories",
                    "24",
                    "--duration",
                    "0.6",
                    "--rate",
                    "200",
                    "--seed",
                    "21",
                ],
            ),
            (
                "val.csv",
                &[
                    "--system",
                    "flexure",
                    "--trajectories",
                    "6",
                    "--duration",
                    "0.6",
                    "--rate",
                    "200",
                    "--seed",
                    "22",
                ],
            ),
            (
                "observe-commission.csv",
                &[
                    "--system",
                    "flexure",
                    "--trajectories",
                    "40",
                    "--duration",
                    "2",
                    "--rate",
                    "200",
                    "--position-noise",
                    "0.000005",
                    "--seed",
                    "23",
                ],
            ),
            (
                "observe-healthy.csv",
                &[
                    "--system",
                    "flexure",
                    "--trajectories",
                    "6",
                    "--duration",
                    "2",
                    "--rate",
                    "200",
                    "--position-noise",
                    "0.000005",
                    "--seed",
                    "24",
                ],
            ),
            (
                "observe-crack.csv",
                &[
                    "--system",
                    "flexure",
                    "--trajectories",
                    "6",
                    "--duration",
                    "2",
                    "--rate",
                    "200",
                    "--position-noise",
                    "0.000005",
                    "--seed",
                    "24",
                    "--change",
                    "k=18",
                    "--change-at",
                    "1",
                ],
            ),
        ],
    ),
    (
        "isolation-mount",
        &[
            (
                "train.csv",
                &[
                    "--system",
                    "mount",
                    "--trajectories",
                    "16",
                    "--duration",
                    "0.3",
                    "--rate",
                    "400",
                    "--seed",
                    "31",
                ],
            ),
            (
                "val.csv",
                &[
                    "--system",
                    "mount",
                    "--trajectories",
                    "4",
                    "--duration",
                    "0.3",
                    "--rate",
                    "400",
                    "--seed",
                    "32",
                ],
            ),
        ],
    ),
    (
        "servo-drivetrain",
        &[
            (
                "train.csv",
                &[
                    "--system",
                    "drivetrain",
                    "--trajectories",
                    "10",
                    "--duration",
                    "4",
                    "--rate",
                    "200",
                    "--seed",
                    "41",
                ],
            ),
            (
                "val.csv",
                &[
                    "--system",
                    "drivetrain",
                    "--trajectories",
                    "3",
                    "--duration",
                    "4",
                    "--rate",
                    "200",
                    "--seed",
                    "42",
                ],
            ),
        ],
    ),
    (
        "trolley-crane",
        &[
            (
                "train.csv",
                &[
                    "--system",
                    "crane-trolley",
                    "--trajectories",
                    "20",
                    "--duration",
                    "10",
                    "--rate",
                    "50",
                    "--seed",
                    "51",
                ],
            ),
            (
                "val.csv",
                &[
                    "--system",
                    "crane-trolley",
                    "--trajectories",
                    "4",
                    "--duration",
                    "10",
                    "--rate",
                    "50",
                    "--seed",
                    "52",
                ],
            ),
        ],
    ),
];

fn visviva(exe: &Path, args: &[&str], extra: &[&Path]) -> Result<()> {
    let mut cmd = Command::new(exe);
    cmd.args(args).args(extra);
    let status = cmd
        .status()
        .with_context(|| format!("starting {}", exe.display()))?;
    if !status.success() {
        bail!("visviva {} failed ({status})", args.join(" "));
    }
    Ok(())
}

fn blobs(out: &Path) -> Result<Vec<(PathBuf, Vec<u8>)>> {
    let mut v = Vec::new();
    for e in std::fs::read_dir(out).with_context(|| format!("reading {}", out.display()))? {
        let p = e?.path();
        if p.extension().is_some_and(|x| x == "vvb") {
            let b = std::fs::read(&p)?;
            v.push((p, b));
        }
    }
    v.sort();
    Ok(v)
}

/// Run every demo; with `verify`, check the logs and blobs reproduce.
pub fn run(verify: bool, regenerate_data: bool) -> Result<bool> {
    let root = crate::workspace_root();
    let exe = crate::tools::build_visviva(&root)?;
    let scratch = root.join("target/demo-verify");
    std::fs::create_dir_all(&scratch)?;
    let mut ok = true;
    for (name, logs) in DEMOS {
        let dir = root.join("models-demo").join(name);
        println!("demo {name}");
        for (file, args) in *logs {
            let committed = dir.join("data").join(file);
            if regenerate_data {
                let mut a = vec!["simulate"];
                a.extend_from_slice(args);
                a.push("--out");
                visviva(&exe, &a, &[&committed])?;
            }
            if verify {
                let fresh = scratch.join(format!("{name}-{file}"));
                let mut a = vec!["simulate"];
                a.extend_from_slice(args);
                a.push("--out");
                visviva(&exe, &a, &[&fresh])?;
                let same = std::fs::read(&fresh)?
                    == std::fs::read(&committed)
                        .with_context(|| format!("reading {}", committed.display()))?;
                println!(
                    "  data/{file}: regenerated by visviva simulate {} the committed file",
                    if same { "equals" } else { "DIFFERS FROM" }
                );
                ok &= same;
            }
        }
        visviva(&exe, &["run", "--force", "--quiet"], &[&dir])?;
        if verify {
            ok &= crate::demo_modes::check(name, &dir)?;
            let first = blobs(&dir.join("out"))?;
            visviva(&exe, &["run", "--force", "--quiet"], &[&dir])?;
            let second = blobs(&dir.join("out"))?;
            let same = first == second && !first.is_empty();
            println!(
                "  {} blobs from two runs with the same seed: {}",
                first.len(),
                if same { "bit-identical" } else { "DIFFERENT" }
            );
            ok &= same;
        }
    }
    ok &= crate::fleet_check::logs(&exe, &root, verify, regenerate_data)?;
    println!(
        "demos: {}",
        if ok {
            "all reproduced"
        } else {
            "NOT reproduced (see above)"
        }
    );
    Ok(ok)
}
