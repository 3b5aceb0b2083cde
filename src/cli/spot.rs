//! `labelweir spot-check`: the trusted-set experts' side of the spot checks — which accepted batches have
//! items waiting for their labels, and recording their answers.

use std::path::PathBuf;

use super::exit;
use super::quarantine::{dispatch, print_json};
use labelweir::policy::spot::Stratum;
use labelweir::review::{Request, SpotAnswerRequest, SpotAnswered, SpotPending};
use labelweir::text::sanitize;

/// Expert spot checks of accepted batches. From each accepted batch the daemon picks a few items the
/// model is least sure of and a few at random, and writes them without the vendor's labels to
/// `DIR/spot-checks/<batch>.csv`; an expert fills in the label column and records the answers here. The
/// answers feed a chart per vendor: when it signals, the vendor's batches wait for review and its recent
/// accepted batches are recalled. A disagreement is a suspicion for review, not proof. Works while the
/// daemon runs (through its admin socket) and while it is stopped; every answer is audited.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    List(ListArgs),
    Answer(AnswerArgs),
}

/// Batches whose spot check waits for the experts, oldest first.
#[derive(Debug, clap::Args)]
struct ListArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Record the experts' labels for one batch's spot check. FILE is CSV with the id and label columns
/// (the batch's spot-check file with its label column filled in will do); every picked item needs an
/// answer. With `[spot_checks] trusted_max` above 0 the answered items join the trusted set as
/// `spot:<batch>:<item>`.
#[derive(Debug, clap::Args)]
struct AnswerArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// The batch.
    batch: String,
    /// The answers.
    file: PathBuf,
    /// Who answered. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::List(a) => {
            let v = dispatch(&a.dir, Request::SpotList)?;
            if a.json {
                print_json(&v)?;
            } else {
                let list: Vec<SpotPending> = serde_json::from_value(v)?;
                if list.is_empty() {
                    println!("no spot check waits for the experts");
                }
                for p in &list {
                    println!(
                        "{}  {:<20} {:<12} {} least sure + {} at random  {}",
                        sanitize(&p.batch_id),
                        sanitize(&p.vendor),
                        p.state.as_str(),
                        p.hard,
                        p.random,
                        sanitize(&p.file)
                    );
                }
            }
        }
        Command::Answer(a) => {
            let (file_name, content) = super::trusted::read_text_file(&a.file)?;
            let req = SpotAnswerRequest {
                batch: a.batch,
                by: a.by.unwrap_or_else(super::init::os_user),
                file_name,
                content,
            };
            let v = dispatch(&a.dir, Request::SpotAnswer(req))?;
            if a.json {
                print_json(&v)?;
            } else {
                let r: SpotAnswered = serde_json::from_value(v)?;
                println!(
                    "batch {} ({}): {} of {} answers differ from the vendor's labels; charts: least sure {:.2}, at random {:.2}; {} items joined the trusted set",
                    sanitize(&r.batch_id),
                    sanitize(&r.vendor),
                    r.disagreed,
                    r.checked,
                    r.hard_statistic,
                    r.random_statistic,
                    r.trusted_added
                );
                if !r.held_for_review.is_empty() {
                    println!(
                        "{} items sat in the pool with a label the experts contradicted: out of the pool now, waiting for a reviewer (`labelweir quarantine held`): {}",
                        r.held_for_review.len(),
                        r.held_for_review.iter().map(|i| sanitize(i)).collect::<Vec<_>>().join(", ")
                    );
                }
                if let Some(e) = &r.trusted_error {
                    println!(
                        "the answered items did not join the trusted set ({}); add them with `labelweir trusted add`",
                        sanitize(e)
                    );
                }
                if let Some(s) = r.signal {
                    let which = match s {
                        Stratum::Hard => "least-sure items",
                        Stratum::Random => "items at random",
                    };
                    println!(
                        "signal on the {which}: the vendor's batches wait for review until `labelweir vendor reset-drift`; {} accepted batches recalled for review ({}). A suspicion for review, not proof.",
                        r.recalled.len(),
                        r.recalled.iter().map(|b| sanitize(b)).collect::<Vec<_>>().join(", ")
                    );
                } else if r.vendor_held {
                    println!("the vendor is held for spot checks since an earlier signal");
                }
            }
        }
    }
    Ok(exit::OK)
}
