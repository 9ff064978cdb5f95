//! A throwaway single-node Slurm cluster for the fleet check: the
//! distribution's `slurm-wlm` and `munge` (installed when `slurmctld` is
//! missing), a munge key, socket and a minimal `slurm.conf` generated under
//! `target/`, daemons started here and stopped by the pids in their pid
//! files (never by name) when the guard drops, also on failure. Every Slurm
//! command runs with `SLURM_CONF` pointing at the generated file.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};

/// The running cluster; dropping it stops slurmd, slurmctld and munged.
pub struct SlurmCluster {
    dir: PathBuf,
    /// The generated `slurm.conf`.
    pub conf: PathBuf,
    pid_files: Vec<PathBuf>,
}

fn which(tool: &str) -> bool {
    Command::new("which")
        .arg(tool)
        .output()
        .is_ok_and(|o| o.status.success())
}

fn run(cmd: &mut Command) -> Result<String> {
    let o = cmd
        .output()
        .with_context(|| format!("starting {:?}", cmd.get_program()))?;
    if !o.status.success() {
        bail!(
            "{:?} failed ({}): {}{}",
            cmd,
            o.status,
            String::from_utf8_lossy(&o.stdout),
            String::from_utf8_lossy(&o.stderr)
        );
    }
    Ok(String::from_utf8_lossy(&o.stdout).into_owned())
}

/// Install Slurm and munge from the distribution when `slurmctld` is missing.
pub fn ensure_installed() -> Result<()> {
    if which("slurmctld") && which("munged") {
        return Ok(());
    }
    println!("installing slurm-wlm and munge (apt-get)");
    run(Command::new("apt-get").arg("update"))?;
    run(Command::new("apt-get")
        .args(["install", "-y", "slurm-wlm", "munge"])
        .env("DEBIAN_FRONTEND", "noninteractive"))?;
    Ok(())
}

fn host() -> Result<String> {
    Ok(run(Command::new("hostname").arg("-s"))?.trim().to_string())
}

fn mem_mb() -> u64 {
    let text = std::fs::read_to_string("/proc/meminfo").unwrap_or_default();
    let kb = text
        .lines()
        .find(|l| l.starts_with("MemTotal:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse::<u64>().ok())
        .unwrap_or(2_000_000);
    (kb / 1024).saturating_sub(512).max(512)
}

fn conf_text(dir: &Path, host: &str, cpus: usize, socket: &Path) -> String {
    let d = dir.display();
    format!(
        "ClusterName=visviva-fleet-check\nSlurmctldHost={host}\nSlurmUser=root\nSlurmdUser=root\n\
AuthType=auth/munge\nCredType=cred/munge\nAuthInfo=socket={socket}\n\
SlurmctldPort=16817\nSlurmdPort=16818\n\
StateSaveLocation={d}/state\nSlurmdSpoolDir={d}/spool\n\
SlurmctldPidFile={d}/slurmctld.pid\nSlurmdPidFile={d}/slurmd.pid\n\
SlurmctldLogFile={d}/slurmctld.log\nSlurmdLogFile={d}/slurmd.log\n\
ProctrackType=proctrack/linuxproc\nTaskPlugin=task/none\nJobAcctGatherType=jobacct_gather/none\n\
AccountingStorageType=accounting_storage/none\nMpiDefault=none\n\
SelectType=select/cons_tres\nSelectTypeParameters=CR_Core\nReturnToService=2\n\
SchedulerType=sched/backfill\nMaxArraySize=1000\n\
NodeName={host} CPUs={cpus} RealMemory={mem} State=UNKNOWN\n\
PartitionName=fleet Nodes={host} Default=YES MaxTime=INFINITE State=UP\n",
        socket = socket.display(),
        mem = mem_mb(),
    )
}

impl SlurmCluster {
    /// Generate the configuration under `dir` (emptied first) and start
    /// munged, slurmctld and slurmd; returns once the node is idle.
    pub fn start(dir: &Path) -> Result<Self> {
        if dir.exists() {
            std::fs::remove_dir_all(dir).with_context(|| format!("removing {}", dir.display()))?;
        }
        for sub in ["state", "spool", "munge"] {
            std::fs::create_dir_all(dir.join(sub))?;
        }
        let dir = std::fs::canonicalize(dir)?;
        let mut cluster = SlurmCluster {
            conf: dir.join("slurm.conf"),
            pid_files: Vec::new(),
            dir: dir.clone(),
        };
        let munge = dir.join("munge");
        let key = munge.join("munge.key");
        let mut bytes = vec![0u8; 1024];
        let mut urandom = std::fs::File::open("/dev/urandom")?;
        std::io::Read::read_exact(&mut urandom, &mut bytes)?;
        std::fs::write(&key, &bytes)?;
        std::fs::set_permissions(&key, std::os::unix::fs::PermissionsExt::from_mode(0o400))?;
        let socket = munge.join("munge.socket");
        cluster.pid_files.push(munge.join("munged.pid"));
        run(Command::new("munged").arg("--force").args([
            format!("--key-file={}", key.display()),
            format!("--socket={}", socket.display()),
            format!("--pid-file={}", munge.join("munged.pid").display()),
            format!("--log-file={}", munge.join("munged.log").display()),
            format!("--seed-file={}", munge.join("munged.seed").display()),
        ]))?;
        let cpus = std::thread::available_parallelism().map_or(1, |n| n.get());
        std::fs::write(&cluster.conf, conf_text(&dir, &host()?, cpus, &socket))?;
        cluster.pid_files.push(dir.join("slurmctld.pid"));
        run(Command::new("slurmctld").env("SLURM_CONF", &cluster.conf))?;
        cluster.pid_files.push(dir.join("slurmd.pid"));
        run(Command::new("slurmd").env("SLURM_CONF", &cluster.conf))?;
        cluster.wait_idle(Duration::from_secs(60))?;
        Ok(cluster)
    }

    /// A Slurm command with this cluster's configuration.
    pub fn command(&self, program: &str) -> Command {
        let mut c = Command::new(program);
        c.env("SLURM_CONF", &self.conf);
        c
    }

    fn wait_idle(&self, timeout: Duration) -> Result<()> {
        let start = Instant::now();
        loop {
            let out = run(self.command("sinfo").args(["-h", "-o", "%t"])).unwrap_or_default();
            if out.lines().any(|l| l.trim() == "idle") {
                return Ok(());
            }
            if start.elapsed() > timeout {
                bail!(
                    "the Slurm node did not become idle within {} s (sinfo: {:?}; logs in {})",
                    timeout.as_secs(),
                    out.trim(),
                    self.dir.display()
                );
            }
            std::thread::sleep(Duration::from_millis(500));
        }
    }

    /// Wait until job `id` has left the queue; false on timeout.
    pub fn wait_job(&self, id: &str, timeout: Duration) -> Result<bool> {
        let start = Instant::now();
        while start.elapsed() < timeout {
            let out = run(self.command("squeue").args(["-h", "-j", id, "-o", "%i %T"]))
                .unwrap_or_default();
            if out.trim().is_empty() {
                return Ok(true);
            }
            std::thread::sleep(Duration::from_secs(1));
        }
        Ok(false)
    }

    /// Stop the daemon whose pid `file` holds, if that pid is still the
    /// daemon we started (its `/proc/PID/comm` is `name`).
    fn stop_pid(file: &Path, name: &str) {
        let Some(pid) = std::fs::read_to_string(file)
            .ok()
            .and_then(|t| t.trim().parse::<u32>().ok())
        else {
            return;
        };
        let comm = std::fs::read_to_string(format!("/proc/{pid}/comm")).unwrap_or_default();
        if comm.trim() != name {
            return;
        }
        let alive = || Path::new(&format!("/proc/{pid}")).exists();
        let _ = Command::new("kill").arg(pid.to_string()).status();
        let start = Instant::now();
        while alive() && start.elapsed() < Duration::from_secs(10) {
            std::thread::sleep(Duration::from_millis(100));
        }
        if alive() {
            let _ = Command::new("kill").args(["-9", &pid.to_string()]).status();
        }
    }
}

impl Drop for SlurmCluster {
    fn drop(&mut self) {
        // slurmd, then slurmctld, then munged: the reverse of the start.
        let names = ["munged", "slurmctld", "slurmd"];
        for (f, name) in self.pid_files.iter().zip(names).rev() {
            Self::stop_pid(f, name);
        }
        println!(
            "slurm cluster stopped (slurmd, slurmctld, munged by pid; logs in {})",
            self.dir.display()
        );
    }
}
