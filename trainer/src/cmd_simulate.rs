//! `keel simulate` (in progress).

/// Arguments of `keel simulate`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Run the command.
pub fn run(_args: Args) -> anyhow::Result<()> {
    anyhow::bail!("keel simulate is not implemented yet")
}
