//! `keel fit` (in progress).

/// Arguments of `keel fit`.
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Run the command.
pub fn run(_args: Args) -> anyhow::Result<()> {
    anyhow::bail!("keel fit is not implemented yet")
}
