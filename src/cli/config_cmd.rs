//! `labelweir config_cmd` (in progress).

/// (in progress)
#[derive(Debug, clap::Args)]
pub struct Args {}

/// Run the subcommand.
pub fn run(_args: Args) -> anyhow::Result<u8> {
    Err(super::Failure::new(super::exit::INTERNAL, "not implemented yet").into())
}
