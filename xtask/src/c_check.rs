//! `cargo xtask c-check`: the C interface used from C. On the host: builds
//! the static library (`visviva-c`, `panic = "abort"`), compiles
//! `runtime/c-api/examples/rollout.c` with the host's C compiler as C11
//! with warnings as errors, and compares every state it prints, bit for
//! bit, with `visviva rollout --bits` for the undriven demo blobs. On five
//! cores (Cortex-M4F, M7, M33, a soft-float Cortex-M3, a soft-float 32-bit
//! RISC-V): builds the library for the core's Rust target and the C
//! firmware `firmware-example/c` with the distribution's cross compiler
//! (its own startup and linker script, the blob in its own region), runs it
//! on a QEMU board and compares its states the same way. Every target also
//! checks the library's CRC-32 of "123456789" against the CRC catalogue's
//! check value 0xCBF43926.

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{bail, Context, Result};

use crate::tools::cargo;

/// Undriven demo blobs and the initial coordinates their rollouts start from
/// (inside each demo's logged range).
const CASES: &[(&str, &[&str])] = &[
    ("crane-sway/out/crane-f32-verlet.vvb", &["0.3"]),
    ("crane-sway/out/crane-int8-verlet.vvb", &["0.3"]),
    ("flexure-sensor/out/flexure-f32-midpoint.vvb", &["0.002"]),
    (
        "isolation-mount/out/mount-int8-yoshida4.vvb",
        &["0.001", "-0.0005"],
    ),
];

const STEPS: usize = 2000;

/// A core the C firmware runs on: Rust target of the library, QEMU board
/// and CPU, and the C compiler's core flags.
struct Board {
    name: &'static str,
    rust_target: &'static str,
    /// C compiler and the distribution package that has it.
    cc: (&'static str, &'static str),
    cflags: &'static [&'static str],
    /// Startup file and linker script (the board's memory map) in
    /// `firmware-example/c`.
    startup: &'static str,
    memory: &'static str,
    /// QEMU system emulator, its package, and its board arguments.
    qemu: (&'static str, &'static str),
    qemu_args: &'static [&'static str],
}

const ARM_CC: (&str, &str) = ("arm-none-eabi-gcc", "gcc-arm-none-eabi");
const ARM_QEMU: (&str, &str) = ("qemu-system-arm", "qemu-system-arm");

/// The cores checked, each on a QEMU board with its memory map in
/// `firmware-example/c`. The Cortex-M3 and the RISC-V core have no FPU:
/// their libraries do float arithmetic in software, so IEEE 754-2019's
/// correctly rounded +, -, *, / and sqrt must give the hardware's bits.
const BOARDS: &[Board] = &[
    Board {
        name: "cortex-m4f-c",
        rust_target: "thumbv7em-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m4",
            "-mfloat-abi=hard",
            "-mfpu=fpv4-sp-d16",
        ],
        startup: "startup.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an386", "-cpu", "cortex-m4"],
    },
    Board {
        name: "cortex-m7-c",
        rust_target: "thumbv7em-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m7",
            "-mfloat-abi=hard",
            "-mfpu=fpv5-d16",
        ],
        startup: "startup.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an500", "-cpu", "cortex-m7"],
    },
    Board {
        name: "cortex-m33-c",
        rust_target: "thumbv8m.main-none-eabihf",
        cc: ARM_CC,
        cflags: &[
            "-mthumb",
            "-mcpu=cortex-m33",
            "-mfloat-abi=hard",
            "-mfpu=fpv5-sp-d16",
        ],
        startup: "startup.c",
        memory: "mps2-an505.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an505", "-cpu", "cortex-m33"],
    },
    Board {
        name: "cortex-m3-softfloat-c",
        rust_target: "thumbv7m-none-eabi",
        cc: ARM_CC,
        cflags: &["-mthumb", "-mcpu=cortex-m3", "-mfloat-abi=soft"],
        startup: "startup.c",
        memory: "mps2-an38x.ld",
        qemu: ARM_QEMU,
        qemu_args: &["-machine", "mps2-an385", "-cpu", "cortex-m3"],
    },
    Board {
        name: "riscv32imac-softfloat-c",
        rust_target: "riscv32imac-unknown-none-elf",
        cc: ("riscv64-unknown-elf-gcc", "gcc-riscv64-unknown-elf"),
        cflags: &["-march=rv32imac", "-mabi=ilp32"],
        startup: "startup-riscv.c",
        memory: "riscv-virt.ld",
        qemu: ("qemu-system-riscv32", "qemu-system-misc"),
        qemu_args: &["-machine", "virt", "-bios", "none"],
    },
];

fn target_dir(root: &Path) -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"))
}

/// Build the static library (for `target`, or the host); returns its path.
fn build_library(root: &Path, target: Option<&str>) -> Result<PathBuf> {
    let mut cmd = Command::new(cargo());
    cmd.args(["rustc", "--quiet", "-p", "visviva-c", "--profile", "c-lib"])
        .args(["--features", "panic-halt", "--crate-type", "staticlib"]);
    if let Some(t) = target {
        cmd.args(["--target", t]);
    }
    let status = cmd
        .current_dir(root)
        .status()
        .context("starting cargo rustc -p visviva-c")?;
    if !status.success() {
        bail!("building the C static library failed ({status})");
    }
    let dir = target.map_or(target_dir(root), |t| target_dir(root).join(t));
    Ok(dir.join("c-lib").join("libvisviva_c.a"))
}

/// Build the C firmware for one blob and initial coordinates; returns the ELF.
fn build_firmware(
    root: &Path,
    board: &Board,
    lib: &Path,
    blob: &Path,
    q: &[&str],
    name: &str,
) -> Result<PathBuf> {
    let c = root.join("firmware-example/c");
    let elf = target_dir(root)
        .join("c-check")
        .join(format!("{}-{name}.elf", board.name));
    let q_init: Vec<String> = q.iter().map(|v| format!("{v}f")).collect();
    let status = Command::new(board.cc.0)
        .args(["-std=c11", "-Wall", "-Wextra", "-Werror", "-O2"])
        .args(board.cflags)
        .args(["-ffreestanding", "-nostdlib"])
        .args([
            "-fno-common",
            "-ffunction-sections",
            "-fdata-sections",
            "-Wl,--gc-sections",
        ])
        .args(["-Wl,--no-warn-execstack", "-I"])
        .arg(root.join("runtime/c-api/include"))
        .arg(format!("-DVV_BLOB_PATH=\"{}\"", blob.display()))
        .arg(format!("-DVV_STEPS={STEPS}"))
        .arg(format!("-DVV_Q_INIT={}", q_init.join(",")))
        .arg("-L")
        .arg(&c)
        .arg("-T")
        .arg(c.join(board.memory))
        .arg(c.join(board.startup))
        .arg(c.join("main.c"))
        .arg(lib)
        .arg("-o")
        .arg(&elf)
        .status()
        .with_context(|| format!("starting {}", board.cc.0))?;
    if !status.success() {
        bail!("building the C firmware for {name} failed ({status})");
    }
    Ok(elf)
}

/// Run a firmware ELF in QEMU; what it wrote through semihosting (QEMU
/// puts SYS_WRITE0 text on its standard error).
fn run_in_qemu(board: &Board, elf: &Path) -> Result<String> {
    let out = Command::new("timeout")
        .args(["120", board.qemu.0])
        .args(board.qemu_args)
        .args(["-nographic", "-serial", "null", "-monitor", "none"])
        .args(["-semihosting-config", "enable=on,target=native", "-kernel"])
        .arg(elf)
        .stdin(std::process::Stdio::null())
        .output()
        .with_context(|| format!("starting {}", board.qemu.0))?;
    let text = String::from_utf8(out.stderr)?;
    if !out.status.success() {
        bail!(
            "{} in QEMU failed ({}): {}",
            elf.display(),
            out.status,
            text.lines().last().unwrap_or("")
        );
    }
    Ok(text)
}

/// Compile the C example against the library; returns the executable.
fn compile_example(root: &Path, lib: &Path) -> Result<PathBuf> {
    let api = root.join("runtime/c-api");
    let exe = target_dir(root).join("c-check").join("rollout");
    std::fs::create_dir_all(exe.parent().unwrap_or(root))?;
    let status = Command::new("cc")
        .args(["-std=c11", "-Wall", "-Wextra", "-Werror", "-O2", "-I"])
        .arg(api.join("include"))
        .arg(api.join("examples/rollout.c"))
        .arg(lib)
        .arg("-o")
        .arg(&exe)
        .status()
        .context("starting cc (the host's C compiler)")?;
    if !status.success() {
        bail!("compiling runtime/c-api/examples/rollout.c failed ({status})");
    }
    Ok(exe)
}

fn stdout_of(cmd: &mut Command) -> Result<String> {
    let out = cmd.output().with_context(|| format!("starting {cmd:?}"))?;
    if !out.status.success() {
        bail!(
            "{cmd:?} failed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        );
    }
    Ok(String::from_utf8(out.stdout)?)
}

/// The state columns (bit patterns) of each data row of either output.
fn state_rows(text: &str, skip_header: bool) -> Vec<Vec<String>> {
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .skip(usize::from(skip_header))
        .map(|l| {
            l.split([',', ' '])
                .skip(1)
                .map(|v| v.trim().to_lowercase())
                .collect()
        })
        .collect()
}

/// A corrupted blob and a newer format version must be refused on `board`
/// through the C interface, with the status's message in the log and a
/// failing exit.
fn refusal_drills(root: &Path, board: &Board, lib: &Path) -> Result<bool> {
    let good = std::fs::read(root.join("models-demo").join(CASES[0].0))?;
    let mut corrupted = good.clone();
    let mid = corrupted.len() / 2;
    corrupted[mid] ^= 0x40;
    let mut newer = good.clone();
    newer[4..6].copy_from_slice(&99u16.to_le_bytes());
    let drills: [(&str, Vec<u8>, &str); 2] = [
        ("corrupted", corrupted, "CRC-32 does not match"),
        ("newer-version", newer, "format version is not readable"),
    ];
    let dir = target_dir(root).join("c-check");
    let mut ok = true;
    for (name, bytes, expected) in drills {
        let blob = dir.join(format!("{name}.vvb"));
        std::fs::write(&blob, bytes)?;
        let elf = build_firmware(root, board, lib, &blob, &["0.3"], name)?;
        let refused = match run_in_qemu(board, &elf) {
            Ok(_) => false,
            Err(e) => format!("{e:#}").contains(expected),
        };
        println!(
            "  refusal drill on {}: {name} blob {}",
            board.name,
            if refused {
                "refused with its status"
            } else {
                "NOT REFUSED"
            }
        );
        ok &= refused;
    }
    Ok(ok)
}

/// Count equal rows; print one line per blob.
fn compare(label: &str, blob: &str, a: &[Vec<String>], b: &[Vec<String>]) -> (usize, usize) {
    let equal = a.iter().zip(b).filter(|(x, y)| x == y).count();
    let count = a.len().max(b.len());
    println!("  {label} {blob}: {equal} of {count} states bit-identical with visviva rollout");
    (equal, count)
}

/// The host C example's and `visviva rollout`'s states for one case.
fn host_rows(visviva: &Path, exe: &Path, path: &Path, q: &[&str]) -> Result<(String, String)> {
    let c_out = stdout_of(Command::new(exe).arg(path).arg(STEPS.to_string()).args(q))?;
    let init: Vec<String> = (0..q.len())
        .map(|i| format!("q{}={}", i + 1, q[i]))
        .chain((0..q.len()).map(|i| format!("p{}=0", i + 1)))
        .collect();
    let host = stdout_of(
        Command::new(visviva)
            .args(["rollout", "--bits", "--model"])
            .arg(path)
            .args(["--init", &init.join(","), "--steps", &STEPS.to_string()]),
    )?;
    Ok((c_out, host))
}

/// Run the check; Ok(false) on any difference.
pub fn run() -> Result<bool> {
    let root = crate::workspace_root();
    for board in BOARDS {
        crate::tools::ensure_rust_target(board.rust_target)?;
        crate::tools::ensure_package(board.cc.0, board.cc.1)?;
        crate::tools::ensure_package(board.qemu.0, board.qemu.1)?;
    }
    let visviva = crate::tools::build_visviva(&root)?;
    let host_lib = build_library(&root, None)?;
    let exe = compile_example(&root, &host_lib)?;
    let libs = BOARDS
        .iter()
        .map(|b| build_library(&root, Some(b.rust_target)))
        .collect::<Result<Vec<_>>>()?;
    let (mut host_same, mut total) = (0usize, 0usize);
    let mut board_same = vec![0usize; BOARDS.len()];
    let mut sizes = vec![None; BOARDS.len()];
    let mut crc_ok = true;
    for (k, (blob, q)) in CASES.iter().enumerate() {
        let path = root.join("models-demo").join(blob);
        let (c_out, host) = host_rows(&visviva, &exe, &path, q)?;
        crc_ok &= c_out.lines().next() == Some("# crc32 0xcbf43926");
        let rollout = state_rows(&host, true);
        let (e, n) = compare("host-c", blob, &state_rows(&c_out, false), &rollout);
        host_same += e;
        total += n;
        for (i, board) in BOARDS.iter().enumerate() {
            let elf = build_firmware(&root, board, &libs[i], &path, q, &format!("case{k}"))?;
            let out = run_in_qemu(board, &elf)?;
            sizes[i].get_or_insert(crate::elf_size::read(&elf)?);
            crc_ok &= out.lines().next() == Some("# crc32 0xcbf43926");
            board_same[i] += compare(board.name, blob, &state_rows(&out, false), &rollout).0;
        }
    }
    println!(
        "  CRC-32 of \"123456789\" through the C interface on every target: {}",
        if crc_ok {
            "0xCBF43926 (catalogue check value)"
        } else {
            "WRONG"
        }
    );
    let mut drills_ok = true;
    for (board, lib) in BOARDS.iter().zip(&libs) {
        drills_ok &= refusal_drills(&root, board, lib)?;
    }
    println!("target host-c: {host_same} of {total} states bit-identical");
    for ((board, same), size) in BOARDS.iter().zip(&board_same).zip(&sizes) {
        let size: crate::elf_size::ElfSize = size.unwrap_or_default();
        println!(
            "target {}: {same} of {total} states bit-identical; C firmware with the library: flash {} B, static RAM {} B (blob apart)",
            board.name,
            size.flash(),
            size.static_ram()
        );
    }
    let same: usize = host_same + board_same.iter().sum::<usize>();
    let targets = BOARDS.len() + 1;
    println!(
        "c check: {same} of {} states bit-identical on {targets} targets",
        total * targets
    );
    Ok(crc_ok && drills_ok && same == total * targets && total > 0)
}
