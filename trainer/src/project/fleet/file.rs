//! The fleet file `fleet.toml`: one project template shared by many units
//! (machines of one kind), the unit folders (a list, or a glob), per-unit
//! overrides of any template key, and the resources a Slurm array task
//! asks for. Unknown keys are errors with their line, like `visviva.toml`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context, Result};
use serde::{Deserialize, Serialize};

use crate::project::file::Project;

/// The whole fleet file.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FleetFile {
    /// Free text shown in the fleet report's title (default: the folder name).
    #[serde(default)]
    pub name: Option<String>,
    /// The project template every unit runs, relative to the fleet folder
    /// (default `visviva.toml`).
    #[serde(default = "default_template")]
    pub template: PathBuf,
    /// Unit folders relative to the fleet folder: a list, or one glob
    /// pattern (`*` and `?` within a path component) such as `"units/*"`.
    pub units: UnitsSpec,
    /// Per-unit overrides of template keys: `[overrides.UNIT]` holds any
    /// part of a `visviva.toml` (e.g. `fit.seed = 3`).
    #[serde(default)]
    pub overrides: BTreeMap<String, toml::Spanned<toml::Table>>,
    /// What one array task asks Slurm for.
    #[serde(default)]
    pub slurm: SlurmResources,
}

fn default_template() -> PathBuf {
    PathBuf::from("visviva.toml")
}

/// `units = [..]` or `units = "glob"`.
#[derive(Debug, Clone, Deserialize)]
#[serde(untagged)]
pub enum UnitsSpec {
    /// Folders named one by one.
    List(Vec<PathBuf>),
    /// One glob pattern.
    Glob(String),
}

/// `[slurm]`: resource requests of one array task (one unit).
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields, default)]
pub struct SlurmResources {
    /// CPUs per task (default 1; the unit's fit uses `[fit] threads`).
    pub cpus: u32,
    /// Memory per task in Slurm's notation, e.g. `"1G"` (default `"1G"`).
    pub memory: String,
    /// Time limit per task, `"HH:MM:SS"` (default `"00:30:00"`).
    pub time_limit: String,
    /// Partition (default: the cluster's default partition).
    pub partition: Option<String>,
    /// Extra `#SBATCH` lines, verbatim (default none), e.g. `"--account=rigs"`.
    pub extra: Vec<String>,
}

impl Default for SlurmResources {
    fn default() -> Self {
        Self {
            cpus: 1,
            memory: "1G".into(),
            time_limit: "00:30:00".into(),
            partition: None,
            extra: Vec::new(),
        }
    }
}

/// One unit, resolved: its folder, its name and its project.
#[derive(Debug, Clone)]
pub struct Unit {
    /// Unit name (its folder's name).
    pub name: String,
    /// The unit folder (logs in it, `out/` written beside them).
    pub dir: PathBuf,
    /// The template with this unit's overrides applied.
    pub project: Project,
    /// The overrides as `key.path = value` lines, for the report.
    pub overrides: Vec<String>,
}

/// A fleet folder read and checked: nothing has been written.
#[derive(Debug, Clone)]
pub struct Fleet {
    /// The fleet folder.
    pub dir: PathBuf,
    /// Fleet name.
    pub name: String,
    /// The parsed fleet file.
    pub file: FleetFile,
    /// The units, by name.
    pub units: Vec<Unit>,
}

fn line_of(text: &str, at: usize) -> usize {
    text[..at.min(text.len())].matches('\n').count() + 1
}

impl FleetFile {
    /// Parse fleet text. Errors name the line and key.
    pub fn parse(text: &str) -> Result<Self> {
        let f: FleetFile = toml::from_str(text).map_err(|e| {
            let at = e
                .span()
                .map(|s| format!("line {}: ", line_of(text, s.start)))
                .unwrap_or_default();
            anyhow!("{at}{}", e.message())
        })?;
        if f.slurm.cpus == 0 {
            bail!("[slurm] cpus must be at least 1");
        }
        Ok(f)
    }
}

impl Fleet {
    /// Read `dir/fleet.toml`, the template and every unit's folder.
    pub fn load(dir: &Path) -> Result<Self> {
        let path = dir.join("fleet.toml");
        let text = std::fs::read_to_string(&path)
            .with_context(|| format!("{}: cannot read", path.display()))?;
        let file = FleetFile::parse(&text).map_err(|e| anyhow!("{}: {e}", path.display()))?;
        let tpath = dir.join(&file.template);
        let ttext = std::fs::read_to_string(&tpath)
            .with_context(|| format!("{}: template: cannot read", tpath.display()))?;
        Project::parse(&ttext).map_err(|e| anyhow!("{}: {e}", tpath.display()))?;
        let template: toml::Table = toml::from_str(&ttext)?;
        let dirs = unit_dirs(dir, &file.units).map_err(|e| anyhow!("{}: {e}", path.display()))?;
        let mut units = Vec::new();
        for d in dirs {
            let name = d
                .file_name()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            let over = file.overrides.get(&name);
            let (project, overrides) =
                apply(&template, over.map(|s| s.get_ref())).map_err(|e| {
                    let line = over.map_or(0, |s| line_of(&text, s.span().start));
                    anyhow!("{}: line {line}: [overrides.{name}]: {e}", path.display())
                })?;
            units.push(Unit {
                name,
                dir: d,
                project,
                overrides,
            });
        }
        let names: std::collections::BTreeSet<&str> =
            units.iter().map(|u| u.name.as_str()).collect();
        if names.len() != units.len() {
            bail!("{}: two unit folders share a name", path.display());
        }
        for (k, v) in &file.overrides {
            if !names.contains(k.as_str()) {
                bail!(
                    "{}: line {}: [overrides.{k}]: no unit of that name (units: {})",
                    path.display(),
                    line_of(&text, v.span().start),
                    names.iter().copied().collect::<Vec<_>>().join(", ")
                );
            }
        }
        let name = file.name.clone().unwrap_or_else(|| folder_name(dir));
        Ok(Fleet {
            dir: dir.to_path_buf(),
            name,
            file,
            units,
        })
    }

    /// `DIR/out`: the fleet report, the Slurm script and the unit index.
    pub fn out(&self) -> PathBuf {
        self.dir.join("out")
    }
}

fn folder_name(dir: &Path) -> String {
    std::fs::canonicalize(dir)
        .ok()
        .and_then(|d| d.file_name().map(|s| s.to_string_lossy().into_owned()))
        .unwrap_or_else(|| dir.display().to_string())
}

/// The template with one unit's overrides merged in (tables key by key,
/// anything else replaced), checked as a project file; and the overrides
/// as `key.path = value` lines.
pub fn apply(template: &toml::Table, over: Option<&toml::Table>) -> Result<(Project, Vec<String>)> {
    let mut merged = template.clone();
    let mut lines = Vec::new();
    if let Some(o) = over {
        merge(&mut merged, o, "", &mut lines);
    }
    let text = toml::to_string(&merged)?;
    let project = Project::parse(&text).map_err(|e| {
        // Lines of the merged text mean nothing to the user: keep the message.
        let msg = e.to_string();
        let msg = match msg.split_once(": ") {
            Some((at, rest)) if at.starts_with("line ") => rest.to_string(),
            _ => msg,
        };
        anyhow!("{msg}")
    })?;
    Ok((project, lines))
}

fn merge(dst: &mut toml::Table, src: &toml::Table, prefix: &str, lines: &mut Vec<String>) {
    for (k, v) in src {
        let key = format!("{prefix}{k}");
        match (dst.get_mut(k), v) {
            (Some(toml::Value::Table(d)), toml::Value::Table(s)) => {
                merge(d, s, &format!("{key}."), lines)
            }
            (_, toml::Value::Table(s)) => {
                let mut d = toml::Table::new();
                merge(&mut d, s, &format!("{key}."), lines);
                dst.insert(k.clone(), toml::Value::Table(d));
            }
            _ => {
                lines.push(format!("{key} = {v}"));
                dst.insert(k.clone(), v.clone());
            }
        }
    }
}

/// The unit folders, sorted by name: each must exist.
fn unit_dirs(dir: &Path, spec: &UnitsSpec) -> Result<Vec<PathBuf>> {
    let mut out = match spec {
        UnitsSpec::List(list) => {
            let mut v = Vec::new();
            for p in list {
                let d = dir.join(p);
                if !d.is_dir() {
                    bail!("units: {} is not a folder", d.display());
                }
                v.push(d);
            }
            v
        }
        UnitsSpec::Glob(pattern) => {
            let v = glob(dir, pattern)?;
            if v.is_empty() {
                bail!("units = \"{pattern}\" matches no folder");
            }
            v
        }
    };
    out.sort_by_key(|d| d.file_name().map(|s| s.to_os_string()));
    Ok(out)
}

/// Folders under `dir` matching `pattern` component by component.
fn glob(dir: &Path, pattern: &str) -> Result<Vec<PathBuf>> {
    if pattern.starts_with('/') || pattern.split('/').any(|c| c == "..") {
        bail!("units = \"{pattern}\": the pattern must stay inside the fleet folder");
    }
    let mut found = vec![dir.to_path_buf()];
    for comp in pattern.split('/').filter(|c| !c.is_empty() && *c != ".") {
        let mut next = Vec::new();
        for base in &found {
            let Ok(rd) = std::fs::read_dir(base) else {
                continue;
            };
            for e in rd.flatten() {
                let name = e.file_name().to_string_lossy().into_owned();
                if e.path().is_dir() && wildcard(comp.as_bytes(), name.as_bytes()) {
                    next.push(e.path());
                }
            }
        }
        found = next;
    }
    Ok(found)
}

/// `*` (any run) and `?` (one character) matching, no other metacharacters.
fn wildcard(p: &[u8], s: &[u8]) -> bool {
    match (p.first(), s.first()) {
        (None, None) => true,
        (Some(b'*'), _) => wildcard(&p[1..], s) || (!s.is_empty() && wildcard(p, &s[1..])),
        (Some(b'?'), Some(_)) => wildcard(&p[1..], &s[1..]),
        (Some(a), Some(b)) if a == b => wildcard(&p[1..], &s[1..]),
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fleet_keys_and_unknown_keys_with_their_line() {
        let f = FleetFile::parse(
            "units = \"units/*\"\n[overrides.a]\nfit.seed = 3\n[slurm]\ncpus = 2\nmemory = \"2G\"\n",
        )
        .unwrap();
        assert!(matches!(f.units, UnitsSpec::Glob(ref g) if g == "units/*"));
        assert_eq!(f.slurm.cpus, 2);
        assert_eq!(f.slurm.time_limit, "00:30:00");
        let err = FleetFile::parse("units = [\"a\"]\n\n[slurm]\nmem = \"1G\"\n").unwrap_err();
        let msg = err.to_string();
        assert!(msg.starts_with("line 4:") && msg.contains("mem"), "{msg}");
    }

    #[test]
    fn overrides_merge_key_by_key_and_are_listed() {
        let t: toml::Table = toml::from_str("[fit]\nepochs = 5\nseed = 1\n").unwrap();
        let o: toml::Table = toml::from_str("[fit]\nseed = 7\n").unwrap();
        let (p, lines) = apply(&t, Some(&o)).unwrap();
        assert_eq!((p.fit.epochs, p.fit.seed), (5, 7));
        assert_eq!(lines, vec!["fit.seed = 7".to_string()]);
        let bad: toml::Table = toml::from_str("[fit]\nsed = 7\n").unwrap();
        let err = apply(&t, Some(&bad)).unwrap_err().to_string();
        assert!(err.contains("sed") && !err.starts_with("line"), "{err}");
    }

    #[test]
    fn wildcards() {
        assert!(wildcard(b"unit-*", b"unit-07"));
        assert!(wildcard(b"u?", b"u1"));
        assert!(!wildcard(b"unit-*", b"crate-07"));
        assert!(!wildcard(b"u?", b"u12"));
    }
}
