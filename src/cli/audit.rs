//! `labelweir audit`: print or export the audit trail.

use std::io::Write;
use std::path::PathBuf;

use chrono::{DateTime, NaiveDate, Utc};

use super::quarantine::dispatch;
use super::{exit, Failure};
use labelweir::review::Request;
use labelweir::store::AuditRecord;
use labelweir::text::sanitize;

/// Print the audit trail: verdicts, reviews (with reviewer and reason), trusted-set changes, notices.
/// `--json` writes JSON Lines (one record per line), the export format.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Workspace folder.
    pub dir: PathBuf,
    /// Only records at or after this time: RFC 3339 (2026-03-01T08:00:00Z), a time without a zone
    /// (2026-03-01T08:00:00, read as UTC like every listing) or a date (2026-03-01, UTC).
    #[arg(long)]
    pub since: Option<String>,
    /// Only records about this vendor.
    #[arg(long)]
    pub vendor: Option<String>,
    /// Only records about this batch.
    #[arg(long)]
    pub batch: Option<String>,
    /// Write JSON Lines.
    #[arg(long)]
    pub json: bool,
    /// Write to this file instead of stdout.
    #[arg(long, short)]
    pub output: Option<PathBuf>,
}

/// Parse `--since`: RFC 3339, a date and time without a zone (`2026-03-01T08:00:00` or with a space,
/// read as UTC, the zone every listing prints), or a calendar date meaning its midnight UTC.
pub fn parse_since(s: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc3339(s)
        .map(|t| t.with_timezone(&Utc))
        .ok()
        .or_else(|| {
            [
                "%Y-%m-%dT%H:%M:%S",
                "%Y-%m-%d %H:%M:%S",
                "%Y-%m-%dT%H:%M",
                "%Y-%m-%d %H:%M",
            ]
            .iter()
            .find_map(|f| chrono::NaiveDateTime::parse_from_str(s, f).ok())
            .map(|t| t.and_utc())
        })
        .or_else(|| {
            NaiveDate::parse_from_str(s, "%Y-%m-%d")
                .ok()
                .and_then(|d| d.and_hms_opt(0, 0, 0))
                .map(|t| t.and_utc())
        })
}

/// The OS user a review action came from (peer credentials on the admin socket, or the process's own
/// user), as `os:NAME(UID)`; `-` for records the daemon wrote itself.
fn os_user(a: &AuditRecord) -> String {
    match (a.detail["os_uid"].as_u64(), a.detail["os_user"].as_str()) {
        (Some(uid), Some(name)) => format!("os:{}({uid})", sanitize(name)),
        (Some(uid), None) => format!("os:uid {uid}"),
        _ => "-".into(),
    }
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let since = match &args.since {
        Some(s) => Some(parse_since(s).ok_or_else(|| {
            Failure::new(
                exit::INPUT,
                format!(
                    "--since {}: expected RFC 3339, YYYY-MM-DDTHH:MM:SS (UTC) or YYYY-MM-DD",
                    sanitize(s)
                ),
            )
        })?),
        None => None,
    };
    let v = dispatch(
        &args.dir,
        Request::Audit {
            since,
            vendor: args.vendor.clone(),
            batch: args.batch.clone(),
        },
    )?;
    let records: Vec<AuditRecord> = serde_json::from_value(v)?;
    if let (Some(vendor), true) = (&args.vendor, records.is_empty()) {
        // A vendor the workspace does not know is a mistake, not an empty trail.
        if let Ok(c) = labelweir::config::Config::from_workspace(&args.dir) {
            if !c.vendors.contains(vendor) {
                return Err(Failure::new(
                    exit::INPUT,
                    format!(
                        "no vendor {} in this workspace (vendors: {})",
                        sanitize(vendor),
                        c.vendors.join(", ")
                    ),
                )
                .into());
            }
        }
    }
    if records.is_empty() && !args.json && args.output.is_none() {
        eprintln!("no audit records match");
    }
    let mut out = Vec::new();
    for a in &records {
        if args.json {
            serde_json::to_writer(&mut out, a)?;
            out.push(b'\n');
        } else {
            let what = match (&a.batch_id, &a.vendor) {
                (Some(b), Some(v)) => format!("{} ({})", sanitize(b), sanitize(v)),
                (Some(b), None) => sanitize(b),
                (None, Some(v)) => sanitize(v),
                (None, None) => String::new(),
            };
            writeln!(
                out,
                "{}  {:<12} {:<18} {:<16} {:<24} {:<16} {}",
                a.at.format("%Y-%m-%d %H:%M:%S"),
                sanitize(&a.actor),
                os_user(a),
                sanitize(&a.action),
                what,
                sanitize(a.outcome.as_deref().unwrap_or("")),
                sanitize(a.reason.as_deref().unwrap_or(""))
            )?;
        }
    }
    match &args.output {
        Some(p) => labelweir::fsx::write_atomic_at(p, &out, None)
            .map(|_| ())
            .map_err(|e| Failure::new(exit::IO, format!("write {}: {e}", p.display())))?,
        None => std::io::stdout().write_all(&out)?,
    }
    Ok(exit::OK)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn since_accepts_rfc3339_and_dates() {
        let t = parse_since("2026-03-01T08:00:00Z").unwrap();
        assert_eq!(t.to_rfc3339(), "2026-03-01T08:00:00+00:00");
        let d = parse_since("2026-03-01").unwrap();
        assert_eq!(d.to_rfc3339(), "2026-03-01T00:00:00+00:00");
        assert!(parse_since("yesterday").is_none());
        // Without a zone: UTC, as every listing prints it.
        assert_eq!(parse_since("2026-03-01T08:00:00"), Some(t));
        assert_eq!(parse_since("2026-03-01 08:00:00"), Some(t));
    }
}
