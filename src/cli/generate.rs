//! `labelweir generate`: shell completions and man pages, generated from the command-line definition itself so
//! they never drift from it.

use std::path::PathBuf;

use super::{exit, Failure};

/// Generate shell completions or man pages from the command-line definition.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    /// Print a completion script for SHELL on stdout, e.g.
    /// `labelweir generate completions bash > /usr/share/bash-completion/completions/labelweir`.
    Completions {
        /// bash, zsh, fish, elvish or powershell.
        shell: clap_complete::Shell,
    },
    /// Write man pages (roff) into DIR: `labelweir.1` and one page per subcommand (`labelweir-quarantine.1`,
    /// ...). View one with `man -l DIR/labelweir.1`.
    Man {
        /// Folder to write into (created if missing).
        dir: PathBuf,
    },
}

/// Run the subcommand on the binary's own command definition `cmd`.
pub fn run(args: Args, mut cmd: clap::Command) -> anyhow::Result<u8> {
    match args.command {
        Command::Completions { shell } => {
            clap_complete::generate(shell, &mut cmd, "labelweir", &mut std::io::stdout());
        }
        Command::Man { dir } => {
            let io = |e: std::io::Error| Failure::new(exit::IO, format!("{}: {e}", dir.display()));
            std::fs::create_dir_all(&dir).map_err(io)?;
            clap_mangen::generate_to(cmd, &dir).map_err(io)?;
            let mut pages: Vec<String> = std::fs::read_dir(&dir)
                .map_err(io)?
                .flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .filter(|n| n.starts_with("labelweir") && n.ends_with(".1"))
                .collect();
            pages.sort();
            println!(
                "wrote {} man pages into {}: {}",
                pages.len(),
                dir.display(),
                pages.join(", ")
            );
        }
    }
    Ok(exit::OK)
}
