//! The workspace configuration: `DIR/labelweir.toml`.
//!
//! One documented default file ships as `config/labelweir.toml`; every key appears there with its default
//! and its unit (units are in the key names: `_ms`, `_secs`, `_bytes`). A test parses the shipped file and
//! compares it with [`Config::default`], so defaults are written once. Unknown keys are errors
//! (`deny_unknown_fields` on every section), and [`Config::validate`] checks what serde cannot (ranges, vendor
//! names, the listen address). `labelweir config check DIR` runs both and exits 78 on failure.

use std::collections::HashSet;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::model::ModelSettings;
use crate::notice::NoticeSettings;
use crate::policy::PolicySettings;

/// The shipped, documented default configuration file (also the template `labelweir init` writes).
pub const SHIPPED_CONFIG: &str = include_str!("../config/labelweir.toml");

/// Name of the configuration file inside a workspace.
pub const CONFIG_FILE: &str = "labelweir.toml";

/// The whole configuration file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    /// Contracted vendors; each has a drop folder `inbox/<vendor>/`. A vendor's identity is the folder a
    /// file arrived in, never anything inside the file.
    pub vendors: Vec<String>,
    /// Drop-folder watching, claiming and limits.
    pub ingest: IngestSettings,
    /// The metrics and health endpoint.
    pub http: HttpSettings,
    /// The admin socket.
    pub admin: AdminSettings,
    /// Column names and the feature schema of batches.
    pub schema: SchemaSettings,
    /// The embedded store.
    pub store: StoreSettings,
    /// The accepted pool's summary upkeep.
    pub pool: PoolSettings,
    /// The label-repair engine.
    pub model: ModelSettings,
    /// When a batch is quarantined.
    pub policy: PolicySettings,
    /// What the flagged items of an accepted batch do.
    pub admission: crate::policy::AdmissionSettings,
    /// What vendor notices disclose.
    pub notices: NoticeSettings,
    /// Trusted-set upkeep.
    pub trusted: TrustedSettings,
    /// Expert spot checks of accepted batches.
    pub spot_checks: crate::policy::spot::SpotSettings,
}

/// Which filesystem watcher feeds the hints (rescans are the truth either way).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WatcherKind {
    /// inotify on Linux (local filesystems).
    Native,
    /// Periodic polling (NFS, CIFS, FUSE, where inotify sees no remote writes).
    Poll,
}

/// The `[ingest]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct IngestSettings {
    /// A file whose mtime is younger than this is left alone (for tools that cannot write to a temporary
    /// name and rename). Milliseconds.
    pub quiet_period_ms: u64,
    /// Full rescan of every vendor folder at this interval, whatever the watcher says. Seconds.
    pub rescan_interval_secs: u64,
    /// Watcher backend.
    pub watcher: WatcherKind,
    /// Poll interval when `watcher = "poll"`. Milliseconds.
    pub poll_interval_ms: u64,
    /// Largest accepted batch file. Bytes.
    pub max_file_bytes: u64,
    /// Most data rows (items) in one batch. Count.
    pub max_rows: usize,
    /// Most columns in one batch, id and label included. Count.
    pub max_columns: usize,
    /// Longest single field. Bytes.
    pub max_field_bytes: usize,
    /// Stop claiming (and report not ready) when free space on the inbox or state filesystem falls below
    /// this. Bytes.
    pub min_free_bytes: u64,
    /// Parsed batches waiting for the scoring worker (the bounded channel between them). Count.
    pub queue_capacity: usize,
}

impl Default for IngestSettings {
    fn default() -> Self {
        Self {
            quiet_period_ms: 2000,
            rescan_interval_secs: 60,
            watcher: WatcherKind::Native,
            poll_interval_ms: 2000,
            max_file_bytes: 64 * 1024 * 1024,
            max_rows: 200_000,
            max_columns: 1024,
            max_field_bytes: 4096,
            min_free_bytes: 64 * 1024 * 1024,
            queue_capacity: 4,
        }
    }
}

/// The `[http]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct HttpSettings {
    /// Serve `/metrics`, `/livez`, `/readyz`.
    pub enabled: bool,
    /// Address and port; loopback by default (put a reverse proxy in front to expose it).
    pub listen: String,
    /// Most connections open at once (also kept below a quarter of the open-file limit); more wait in
    /// the kernel's backlog. Count.
    pub max_connections: usize,
    /// A connection that sends or reads nothing for this long is closed. Seconds.
    pub idle_timeout_secs: u64,
}

impl Default for HttpSettings {
    fn default() -> Self {
        Self {
            enabled: true,
            listen: "127.0.0.1:9464".into(),
            max_connections: 64,
            idle_timeout_secs: 15,
        }
    }
}

/// The `[admin]` section: who may use the admin socket, and its connection limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AdminSettings {
    /// The reviewers' group (a name from /etc/group or a numeric gid): besides root and the daemon's own
    /// user, only its members may use the admin socket (checked on the peer's credentials). Empty: root
    /// and the daemon's user only.
    pub reviewer_group: String,
    /// Most admin connections open at once (also kept below an eighth of the open-file limit). Count.
    pub max_connections: usize,
    /// A client must send its whole request within this time. Seconds.
    pub request_timeout_secs: u64,
}

impl Default for AdminSettings {
    fn default() -> Self {
        Self {
            reviewer_group: String::new(),
            max_connections: 16,
            request_timeout_secs: 30,
        }
    }
}

/// The `[schema]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SchemaSettings {
    /// Column holding the item id.
    pub id_column: String,
    /// Column holding the label (a class name of the trusted set).
    pub label_column: String,
    /// Expected feature columns, in order. Empty: the feature columns of the trusted set given to
    /// `labelweir init` (stored in the workspace). Non-empty: must equal those.
    pub features: Vec<String>,
}

impl Default for SchemaSettings {
    fn default() -> Self {
        Self {
            id_column: "id".into(),
            label_column: "label".into(),
            features: Vec::new(),
        }
    }
}

/// The `[store]` section (sled).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct StoreSettings {
    /// sled's page cache. Bytes.
    pub cache_capacity_bytes: u64,
    /// sled's background flush, as insurance (every transition is flushed explicitly anyway).
    /// Milliseconds; 0 turns it off.
    pub flush_every_ms: u64,
}

impl Default for StoreSettings {
    fn default() -> Self {
        Self {
            cache_capacity_bytes: 64 * 1024 * 1024,
            flush_every_ms: 500,
        }
    }
}

/// The `[pool]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct PoolSettings {
    /// Rebuild the pool summary exactly from the stored pool at this interval, in the background (when the
    /// pool changed since the last rebuild). Seconds; 0 turns it off.
    pub exact_refresh_interval_secs: u64,
    /// Save the in-memory pool summary to the store at this interval (and at shutdown). Seconds.
    pub summary_save_interval_secs: u64,
}

impl Default for PoolSettings {
    fn default() -> Self {
        Self {
            exact_refresh_interval_secs: 3600,
            summary_save_interval_secs: 60,
        }
    }
}

/// The `[trusted]` section of the configuration: the trusted set's rolling window, balance checks, and the
/// re-check of recently accepted batches after the set changes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TrustedSettings {
    /// Keep at most this many trusted items per class; when exceeded the oldest (by verification time)
    /// leave the set. Items; 0 = no limit. Default 0.
    pub max_items_per_class: usize,
    /// Trusted items verified longer ago than this leave the set (but never below
    /// `min_items_per_class` for their class). Days; 0 = no age limit. Default 0.
    pub max_age_days: u32,
    /// A class with fewer trusted items than this cannot be judged reliably: `trusted` commands and the
    /// daemon warn. Items; default 5.
    pub min_items_per_class: usize,
    /// After the trusted set changes, re-score at most this many of the most recently accepted batches.
    /// Batches; 0 disables the re-check. Default 20.
    pub rescore_lookback_batches: usize,
    /// ... and only those accepted within this many days. Days; 0 = no age limit. Default 7.
    pub rescore_lookback_days: u32,
}

impl Default for TrustedSettings {
    fn default() -> Self {
        Self {
            max_items_per_class: 0,
            max_age_days: 0,
            min_items_per_class: 5,
            rescore_lookback_batches: 20,
            rescore_lookback_days: 7,
        }
    }
}

/// A configuration that cannot be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The file could not be read.
    #[error("cannot read {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// TOML syntax, a wrong type, or an unknown key.
    #[error("{path}: {message}")]
    Parse {
        /// The file.
        path: PathBuf,
        /// The parser's message (it names the key and line).
        message: String,
    },
    /// A value out of its allowed range.
    #[error("{key}: {message}")]
    Invalid {
        /// The offending key, e.g. `ingest.quiet_period_ms`.
        key: String,
        /// What is wrong.
        message: String,
    },
}

fn invalid(key: &str, message: impl Into<String>) -> ConfigError {
    ConfigError::Invalid {
        key: key.into(),
        message: message.into(),
    }
}

/// Whether a vendor name is acceptable as a folder name and a metric label value:
/// 1–64 characters from `a-z 0-9 _ -`, starting with a letter or digit, and not `tmp`.
pub(crate) fn valid_vendor_name(name: &str) -> bool {
    let b = name.as_bytes();
    !b.is_empty()
        && b.len() <= 64
        && b[0].is_ascii_alphanumeric()
        && b.iter()
            .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || *c == b'_' || *c == b'-')
        && name != "tmp"
}

/// A configuration published by a successful SIGHUP reload; each pipeline thread picks it up at its next
/// safe point (between batches), the admin socket at its next request.
#[derive(Debug, Default)]
pub struct ConfigSlot {
    inner: std::sync::RwLock<Option<(u64, std::sync::Arc<Config>)>>,
}

impl ConfigSlot {
    /// Publish a new configuration (generation numbers count up from 1).
    pub fn publish(&self, config: std::sync::Arc<Config>) {
        if let Ok(mut g) = self.inner.write() {
            let generation = g.as_ref().map_or(1, |(n, _)| n + 1);
            *g = Some((generation, config));
        }
    }

    /// The configuration published after generation `*seen`, if any (and `*seen` moves to it).
    pub fn newer(&self, seen: &mut u64) -> Option<std::sync::Arc<Config>> {
        let g = self.inner.read().ok()?;
        match &*g {
            Some((n, c)) if *n > *seen => {
                *seen = *n;
                Some(c.clone())
            }
            _ => None,
        }
    }

    /// The latest published configuration, if any.
    pub fn current(&self) -> Option<std::sync::Arc<Config>> {
        self.inner.read().ok()?.as_ref().map(|(_, c)| c.clone())
    }
}

impl Config {
    /// The settings that differ between `self` and `new` and take effect only at start, so a running
    /// daemon cannot reload them: `vendors`, `[http]`, `[schema]`, `[store]`, `[pool]`, `[model]` (the pool
    /// summary and the scores already recorded depend on it) and `ingest.watcher`, `ingest.poll_interval_ms`
    /// and `ingest.queue_capacity`. `[policy]`, `[notices]`, `[trusted]` and the rest of `[ingest]` reload.
    pub(crate) fn restart_only_changes(&self, new: &Config) -> Vec<&'static str> {
        let mut out = Vec::new();
        let mut check = |differs: bool, name: &'static str| {
            if differs {
                out.push(name);
            }
        };
        check(self.vendors != new.vendors, "vendors");
        check(self.http != new.http, "http");
        check(
            self.admin.max_connections != new.admin.max_connections,
            "admin.max_connections",
        );
        check(self.schema != new.schema, "schema");
        check(self.store != new.store, "store");
        check(self.pool != new.pool, "pool");
        check(self.model != new.model, "model");
        check(self.ingest.watcher != new.ingest.watcher, "ingest.watcher");
        check(
            self.ingest.poll_interval_ms != new.ingest.poll_interval_ms,
            "ingest.poll_interval_ms",
        );
        check(
            self.ingest.queue_capacity != new.ingest.queue_capacity,
            "ingest.queue_capacity",
        );
        out
    }

    /// Parse TOML text without semantic validation (the shipped file has no vendors and parses this way).
    pub fn parse_str(text: &str, path: &Path) -> Result<Self, ConfigError> {
        toml::from_str(text).map_err(|e| ConfigError::Parse {
            path: path.to_path_buf(),
            message: e.to_string(),
        })
    }

    /// Read, parse and validate a configuration file.
    pub fn from_file(path: &Path) -> Result<Self, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let config = Self::parse_str(&text, path)?;
        config.validate()?;
        Ok(config)
    }

    /// Read `DIR/labelweir.toml`.
    pub fn from_workspace(dir: &Path) -> Result<Self, ConfigError> {
        Self::from_file(&dir.join(CONFIG_FILE))
    }

    /// Semantic validation.
    pub fn validate(&self) -> Result<(), ConfigError> {
        if self.vendors.is_empty() {
            return Err(invalid("vendors", "list at least one vendor"));
        }
        let mut seen = HashSet::new();
        for v in &self.vendors {
            if !valid_vendor_name(v) {
                return Err(invalid(
                    "vendors",
                    format!(
                        "{:?} is not a valid vendor name (1-64 of a-z 0-9 _ -, starting with a letter or digit, not \"tmp\")",
                        v
                    ),
                ));
            }
            if !seen.insert(v) {
                return Err(invalid("vendors", format!("{v:?} is listed twice")));
            }
        }
        let i = &self.ingest;
        if i.rescan_interval_secs == 0 || i.rescan_interval_secs > 86_400 {
            return Err(invalid(
                "ingest.rescan_interval_secs",
                "must be in 1..=86400",
            ));
        }
        if i.quiet_period_ms > 3_600_000 {
            return Err(invalid(
                "ingest.quiet_period_ms",
                "must be at most 3600000 (one hour)",
            ));
        }
        if i.poll_interval_ms < 10 {
            return Err(invalid("ingest.poll_interval_ms", "must be at least 10"));
        }
        if i.max_file_bytes == 0 || i.max_file_bytes > usize::MAX as u64 {
            return Err(invalid("ingest.max_file_bytes", "must be > 0"));
        }
        if i.max_rows == 0 {
            return Err(invalid("ingest.max_rows", "must be > 0"));
        }
        if i.max_columns < 3 {
            return Err(invalid(
                "ingest.max_columns",
                "must be at least 3 (id, label, one feature)",
            ));
        }
        if i.max_field_bytes == 0 {
            return Err(invalid("ingest.max_field_bytes", "must be > 0"));
        }
        if i.queue_capacity == 0 || i.queue_capacity > 1024 {
            return Err(invalid("ingest.queue_capacity", "must be in 1..=1024"));
        }
        self.listen_addr()?;
        if self.http.max_connections == 0 || self.http.idle_timeout_secs == 0 {
            return Err(invalid(
                "http.max_connections / http.idle_timeout_secs",
                "must be > 0",
            ));
        }
        if self.admin.max_connections == 0 || self.admin.request_timeout_secs == 0 {
            return Err(invalid(
                "admin.max_connections / admin.request_timeout_secs",
                "must be > 0",
            ));
        }
        let s = &self.schema;
        if s.id_column.is_empty() || s.label_column.is_empty() || s.id_column == s.label_column {
            return Err(invalid(
                "schema.id_column / schema.label_column",
                "must be non-empty and different",
            ));
        }
        let mut names = HashSet::new();
        for f in &s.features {
            if f.is_empty() || *f == s.id_column || *f == s.label_column || !names.insert(f) {
                return Err(invalid(
                    "schema.features",
                    format!("{f:?} is empty, repeated, or names the id/label column"),
                ));
            }
        }
        if self.store.cache_capacity_bytes < 1024 * 1024 {
            return Err(invalid(
                "store.cache_capacity_bytes",
                "must be at least 1048576",
            ));
        }
        if self.pool.summary_save_interval_secs == 0 {
            return Err(invalid("pool.summary_save_interval_secs", "must be > 0"));
        }
        self.model
            .validate()
            .map_err(|e| invalid("model", e.to_string()))?;
        self.policy
            .validate()
            .map_err(|e| invalid("policy", e.to_string()))?;
        let floor = self.admission.relabel_min_confidence;
        if !(floor > 0.0 && floor <= 1.0) {
            return Err(invalid(
                "admission.relabel_min_confidence",
                "must be in (0, 1]",
            ));
        }
        for (key, v) in [
            ("admission.unsure_share", self.admission.unsure_share),
            (
                "admission.unsure_min_suspicion",
                self.admission.unsure_min_suspicion,
            ),
            ("admission.hold_suspicion", self.admission.hold_suspicion),
        ] {
            if !(0.0..=1.0).contains(&v) {
                return Err(invalid(key, "must be in [0, 1]"));
            }
        }
        self.spot_checks
            .validate()
            .map_err(|(key, why)| invalid(&format!("spot_checks.{key}"), why))?;
        Ok(())
    }

    /// The metrics listen address.
    pub(crate) fn listen_addr(&self) -> Result<SocketAddr, ConfigError> {
        self.http.listen.parse().map_err(|_| {
            invalid(
                "http.listen",
                format!(
                    "{:?} is not an address like 127.0.0.1:9464",
                    self.http.listen
                ),
            )
        })
    }

    /// Parse limits for the data module, from `[ingest]`.
    pub fn limits(&self) -> crate::data::Limits {
        crate::data::Limits {
            max_bytes: self.ingest.max_file_bytes as usize,
            max_rows: self.ingest.max_rows,
            max_columns: self.ingest.max_columns,
            max_field_bytes: self.ingest.max_field_bytes,
        }
    }

    /// Table options for the data module.
    pub fn table_options(&self) -> crate::data::TableOptions {
        crate::data::TableOptions {
            id_column: self.schema.id_column.clone(),
            label_column: self.schema.label_column.clone(),
            limits: self.limits(),
        }
    }
}

/// The shipped configuration text with the `vendors = [...]` line set to the given vendors (what
/// `labelweir init` writes).
pub(crate) fn render_with_vendors(vendors: &[String]) -> String {
    let list = vendors
        .iter()
        .map(|v| format!("{v:?}"))
        .collect::<Vec<_>>()
        .join(", ");
    let mut out = String::with_capacity(SHIPPED_CONFIG.len() + 64);
    let mut replaced = false;
    for line in SHIPPED_CONFIG.lines() {
        if !replaced && line.starts_with("vendors = ") {
            out.push_str(&format!("vendors = [{list}]\n"));
            replaced = true;
        } else {
            out.push_str(line);
            out.push('\n');
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reload_accepts_policy_and_refuses_restart_only_settings() {
        let a = Config::default();
        let mut b = a.clone();
        b.policy.max_flagged_share = 0.2;
        b.notices.markdown = !a.notices.markdown;
        b.ingest.rescan_interval_secs = 5;
        assert!(a.restart_only_changes(&b).is_empty());
        b.model.l2 *= 2.0;
        b.ingest.queue_capacity += 1;
        b.vendors.push("new-vendor".into());
        assert_eq!(
            a.restart_only_changes(&b),
            vec!["vendors", "model", "ingest.queue_capacity"]
        );
    }

    #[test]
    fn config_slot_hands_each_reader_every_newer_generation_once() {
        let slot = ConfigSlot::default();
        let mut seen = 0;
        assert!(slot.newer(&mut seen).is_none() && slot.current().is_none());
        let mut c = Config::default();
        c.policy.max_flagged_share = 0.2;
        slot.publish(std::sync::Arc::new(c.clone()));
        assert_eq!(
            slot.newer(&mut seen).map(|x| x.policy.max_flagged_share),
            Some(0.2)
        );
        assert_eq!(seen, 1);
        assert!(slot.newer(&mut seen).is_none(), "only once");
        c.policy.max_flagged_share = 0.3;
        slot.publish(std::sync::Arc::new(c));
        let mut late = 0;
        assert_eq!(
            slot.newer(&mut late).map(|x| x.policy.max_flagged_share),
            Some(0.3)
        );
        assert_eq!(late, 2);
        assert_eq!(
            slot.current().map(|x| x.policy.max_flagged_share),
            Some(0.3)
        );
    }

    #[test]
    fn shipped_file_is_the_defaults() {
        let parsed = Config::parse_str(SHIPPED_CONFIG, Path::new("config/labelweir.toml")).unwrap();
        assert_eq!(parsed, Config::default());
    }

    /// Every key of every section appears in the shipped file (serde defaults would hide a missing one
    /// from the equality test above).
    #[test]
    fn shipped_file_lists_every_key() {
        fn keys(v: &toml::Value, prefix: &str, out: &mut Vec<String>) {
            if let toml::Value::Table(t) = v {
                for (k, v) in t {
                    let path = format!("{prefix}{k}");
                    // Inline tables (e.g. a feature map variant) are values, not sections.
                    if matches!(v, toml::Value::Table(_)) && prefix.matches('.').count() < 1 {
                        keys(v, &format!("{path}."), out);
                    } else {
                        out.push(path);
                    }
                }
            }
        }
        let mut want = Vec::new();
        keys(
            &toml::Value::try_from(Config::default()).unwrap(),
            "",
            &mut want,
        );
        let mut have = Vec::new();
        keys(
            &toml::from_str::<toml::Value>(SHIPPED_CONFIG).unwrap(),
            "",
            &mut have,
        );
        want.sort();
        have.sort();
        assert_eq!(have, want);
    }

    #[test]
    fn rendered_file_validates_and_lists_vendors() {
        let text = render_with_vendors(&["north-sort".into(), "b2".into()]);
        let c = Config::parse_str(&text, Path::new("x")).unwrap();
        c.validate().unwrap();
        assert_eq!(c.vendors, vec!["north-sort".to_string(), "b2".to_string()]);
    }

    #[test]
    fn unknown_keys_are_rejected() {
        let e = Config::parse_str(
            "vendors = [\"a\"]\n[ingest]\nquiet_period = 3\n",
            Path::new("x"),
        )
        .unwrap_err();
        assert!(e.to_string().contains("quiet_period"), "{e}");
    }

    #[test]
    fn semantic_validation_names_the_key() {
        let mut c = Config {
            vendors: vec!["a".into()],
            ..Config::default()
        };
        c.validate().unwrap();
        c.ingest.rescan_interval_secs = 0;
        assert!(c
            .validate()
            .unwrap_err()
            .to_string()
            .contains("rescan_interval_secs"));
        c.ingest.rescan_interval_secs = 5;
        c.http.listen = "localhost".into();
        assert!(c
            .validate()
            .unwrap_err()
            .to_string()
            .contains("http.listen"));
        c.http.listen = "127.0.0.1:1".into();
        c.vendors = vec!["../etc".into()];
        assert!(c.validate().unwrap_err().to_string().contains("vendors"));
        c.vendors = vec!["a".into(), "a".into()];
        assert!(c.validate().is_err());
    }

    #[test]
    fn vendor_names() {
        for ok in ["a", "north-sort", "v_2"] {
            assert!(valid_vendor_name(ok), "{ok}");
        }
        for bad in ["", "A", "-x", "a/b", "..", "tmp", "a b", &"x".repeat(65)] {
            assert!(!valid_vendor_name(bad), "{bad}");
        }
    }
}
