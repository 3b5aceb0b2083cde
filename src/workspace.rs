//! A workspace's folders: their paths, their creation and checks, and creating a new workspace (what
//! `labelweir init` does).

use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};

use chrono::Utc;

use crate::config::{self, Config, WatcherKind, CONFIG_FILE};
use std::collections::HashMap;

use crate::data::{self, Classes, FeatureTable, TableOptions};
use crate::model::{FeatureMap, Standardizer};
use crate::notice::{NOTICES_MODE, VENDOR_NOTICES_MODE};
use crate::store::{
    AuditRecord, Provenance, Store, StoreError, TrustedItem, WorkspaceMeta, RECORD_VERSION,
};

/// Why a workspace could not be created or prepared; the binary picks an exit code per kind.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum WorkspaceError {
    /// Bad input: the trusted file, the vendor names, or a folder that already holds a workspace.
    #[error("{0}")]
    Input(String),
    /// The layout or the configuration is unusable (folders on two filesystems, a link where a folder
    /// belongs, inotify on a network filesystem, a feature map that cannot be built).
    #[error("configuration: {0}")]
    Config(String),
    /// Filesystem error.
    #[error("{what}: {source}")]
    Io {
        /// What was being done, on which path.
        what: String,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// Store error.
    #[error(transparent)]
    Store(#[from] StoreError),
}

fn io(what: impl std::fmt::Display) -> impl FnOnce(std::io::Error) -> WorkspaceError {
    let what = what.to_string();
    move |source| WorkspaceError::Io { what, source }
}

/// The folders of a workspace (`DIR`): `labelweir.toml`, `inbox/<vendor>/`, the daemon-private
/// `processing/`, `accepted/`, `quarantine/`, `rejected/`, `notices/<vendor>/`, and the store in `state/`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Workspace {
    /// The workspace root.
    pub root: PathBuf,
}

impl Workspace {
    /// Folders the daemon owns, created by `init`.
    pub const PRIVATE_FOLDERS: [&'static str; 6] = [
        "processing",
        "accepted",
        "quarantine",
        "rejected",
        "notices",
        "state",
    ];

    /// A workspace rooted at `root`.
    pub fn new(root: impl Into<PathBuf>) -> Self {
        Self { root: root.into() }
    }

    /// `DIR/labelweir.toml`.
    pub fn config_file(&self) -> PathBuf {
        self.root.join(CONFIG_FILE)
    }

    /// `DIR/inbox`.
    pub fn inbox(&self) -> PathBuf {
        self.root.join("inbox")
    }

    /// `DIR/inbox/<vendor>`.
    pub fn vendor_inbox(&self, vendor: &str) -> PathBuf {
        self.inbox().join(vendor)
    }

    /// `DIR/processing`.
    pub fn processing(&self) -> PathBuf {
        self.root.join("processing")
    }

    /// `DIR/accepted`, `DIR/quarantine` or `DIR/rejected` (by name, as in `store::Outcome::folder`).
    pub fn folder(&self, name: &str) -> PathBuf {
        self.root.join(name)
    }

    /// `DIR/spot-checks`: the items of accepted batches waiting for the experts' labels, one file per
    /// batch (`<batch>.csv`, the label column empty).
    pub fn spot_checks(&self) -> PathBuf {
        self.root.join("spot-checks")
    }

    /// `DIR/notices/<vendor>`.
    pub fn notices(&self, vendor: &str) -> PathBuf {
        self.root.join("notices").join(vendor)
    }

    /// `DIR/state` (the sled store).
    pub fn state(&self) -> PathBuf {
        self.root.join("state")
    }

    /// `DIR/features/incoming` (the team's drop folder for feature-table files; never a vendor's).
    pub fn features_incoming(&self) -> PathBuf {
        self.root.join("features").join("incoming")
    }

    /// `DIR/features/imported` (feature-table files taken in, renamed `<import seq>-<name>`).
    pub fn features_imported(&self) -> PathBuf {
        self.root.join("features").join("imported")
    }

    /// `DIR/features/rejected` (feature-table files refused, each with a `.reason.txt`).
    pub fn features_rejected(&self) -> PathBuf {
        self.root.join("features").join("rejected")
    }

    /// `DIR/admin.sock` (the review commands' channel to a running daemon).
    pub fn admin_socket(&self) -> PathBuf {
        self.root.join("admin.sock")
    }
}

/// Filesystems on which inotify does not see files written elsewhere (by other clients of a network share,
/// or through a FUSE daemon), by their `statfs` magic number (`f_type`). Values from the Linux statfs(2)
/// manual page (man-pages 6.03, the `f_type` table), Ceph's from Linux's `include/uapi/linux/magic.h`
/// (`CEPH_SUPER_MAGIC`, not in that table); `remote_filesystem_kind`'s test checks them one by one.
const REMOTE_FILESYSTEMS: [(u64, &str); 8] = [
    (0x6969, "NFS"),
    (0x517B, "SMB"),
    (0xFF53_4D42, "CIFS"),
    (0xFE53_4D42, "SMB2"),
    (0x6573_5546, "FUSE"),
    (0x0102_1997, "9p"),
    (0x00C3_6400, "Ceph"),
    (0x5346_414F, "AFS"),
];

/// The kind of network or FUSE filesystem holding `path`, if it is one (`None` also when `statfs` fails).
pub fn remote_filesystem(path: &Path) -> Option<&'static str> {
    let st = rustix::fs::statfs(path).ok()?;
    #[allow(clippy::unnecessary_cast)] // `f_type`'s C type differs between architectures
    remote_filesystem_kind(st.f_type as i64)
}

/// The classification behind [`remote_filesystem`], a pure function of `statfs`'s `f_type`: the kind of
/// network or FUSE filesystem, or `None` for any other. `f_type` is a C long; the magic numbers are 32-bit
/// (a 32-bit `f_type` may arrive sign-extended, as CIFS's `0xFF534D42` does), so only the low 32 bits count.
fn remote_filesystem_kind(f_type: i64) -> Option<&'static str> {
    let magic = (f_type as u64) & 0xFFFF_FFFF;
    REMOTE_FILESYSTEMS
        .iter()
        .find(|(m, _)| *m == magic)
        .map(|(_, name)| *name)
}

impl Workspace {
    /// The mode a folder of the workspace gets when the daemon or `init` creates it, where it matters
    /// beyond the umask (the notice folders; the others are set by `init`).
    fn created_mode(&self, dir: &Path) -> Option<u32> {
        let notices = self.root.join("notices");
        if dir == notices {
            Some(NOTICES_MODE)
        } else if dir.parent() == Some(notices.as_path()) {
            Some(VENDOR_NOTICES_MODE)
        } else {
            None
        }
    }
}

/// Create missing folders (vendors may have been added to the config) and check that every folder is on
/// one filesystem (renames between them must be atomic), and that this filesystem is not a network or FUSE
/// mount unless `ingest.watcher = "poll"` (inotify does not see remote writes there).
pub fn prepare_folders(ws: &Workspace, config: &Config) -> Result<(), WorkspaceError> {
    if !ws.root.is_dir() {
        return Err(WorkspaceError::Config(format!(
            "{} is not a workspace folder",
            ws.root.display()
        )));
    }
    let mut dirs = vec![
        ws.inbox(),
        ws.processing(),
        ws.folder("accepted"),
        ws.folder("quarantine"),
        ws.folder("rejected"),
        ws.root.join("notices"),
        ws.state(),
        ws.features_incoming(),
        ws.features_imported(),
        ws.features_rejected(),
        ws.spot_checks(),
    ];
    for v in &config.vendors {
        dirs.push(ws.vendor_inbox(v));
        dirs.push(ws.notices(v));
    }
    let mut dev = None;
    for d in &dirs {
        let existed = std::fs::symlink_metadata(d).is_ok();
        std::fs::create_dir_all(d).map_err(io(d.display()))?;
        if !existed {
            if let Some(mode) = ws.created_mode(d) {
                std::fs::set_permissions(d, std::fs::Permissions::from_mode(mode))
                    .map_err(io(d.display()))?;
            }
        }
        let m = std::fs::symlink_metadata(d).map_err(io(d.display()))?;
        if !m.is_dir() {
            return Err(WorkspaceError::Config(format!(
                "{} must be a directory, not a link",
                d.display()
            )));
        }
        match dev {
            None => dev = Some(m.dev()),
            Some(x) if x != m.dev() => {
                return Err(WorkspaceError::Config(format!(
                    "{} is on another filesystem than the rest of the workspace; inbox, processing, accepted, quarantine, rejected, notices and state must share one filesystem",
                    d.display()
                )))
            }
            _ => {}
        }
    }
    if config.ingest.watcher == WatcherKind::Native {
        if let Some(kind) = remote_filesystem(&ws.inbox()) {
            return Err(WorkspaceError::Config(format!(
                "{} is on a {kind} filesystem, where inotify does not see files written by other machines or through the FUSE daemon; set [ingest] watcher = \"poll\" in labelweir.toml",
                ws.inbox().display()
            )));
        }
    }
    Ok(())
}

/// Free bytes available to the daemon on the filesystem holding `path`.
pub fn free_bytes(path: &Path) -> Option<u64> {
    rustix::fs::statvfs(path)
        .ok()
        .map(|s| s.f_bavail.saturating_mul(s.f_frsize))
}

/// Create a workspace in `dir`: the configuration file (the shipped defaults with `vendors`), a drop folder
/// per vendor, the daemon's folders, and the store seeded with the trusted set read from `trusted` (its
/// feature columns become the schema, its labels the classes; features are standardised on it), verified
/// by `by`. Returns the number of trusted items stored. See [`create_workspace_with`] for a feature table
/// and an imported pool.
pub fn create_workspace(
    dir: &std::path::Path,
    trusted: &std::path::Path,
    vendors: &[String],
    by: &str,
) -> Result<usize, WorkspaceError> {
    create_workspace_with(dir, trusted, vendors, by, &InitExtras::default())
}

/// Optional parts of a new workspace.
#[derive(Debug, Clone, Default)]
pub struct InitExtras {
    /// A feature table (id + feature columns; CSV, JSON Lines or Parquet): the workspace then takes
    /// features by reference. Its columns become the feature schema; the trusted set and the pool may be
    /// `id,label` files joined against it (or carry exactly its columns).
    pub features: Option<PathBuf>,
    /// An existing training pool (id, label and the schema's features, or `id,label` in by-reference
    /// mode), imported with its provenance so the daemon starts with a warm pool.
    pub pool: Option<PathBuf>,
}

/// How the team's own files (trusted set, feature table, imported pool) are read: the configured id and
/// label column names, with limits sized for a team's files rather than a vendor's batch: 8 GiB, 20
/// million rows, 4,096 columns (a 1,024-dimension embedding plus id and label fits), 4 KiB per field.
pub fn team_file_options(cfg: &Config) -> TableOptions {
    TableOptions {
        id_column: cfg.schema.id_column.clone(),
        label_column: cfg.schema.label_column.clone(),
        limits: data::Limits {
            max_bytes: 8 << 30,
            max_rows: 20_000_000,
            max_columns: 4096,
            max_field_bytes: 4096,
        },
    }
}

/// A file's bytes, the parsed table, and its provenance.
struct Loaded {
    table: data::Table,
    provenance: Provenance,
}

fn provenance(path: &Path, bytes: &[u8], by: &str) -> Provenance {
    use sha2::Digest;
    Provenance {
        source: path
            .file_name()
            .map(crate::text::escape_name)
            .unwrap_or_default(),
        sha256: hex::encode(sha2::Sha256::digest(bytes)),
        by: by.to_string(),
        at: Utc::now(),
    }
}

/// Read a labeled file for `init`: with a feature table, an `id,label` file is joined against it and a
/// file with features must carry exactly the table's columns; without one, every other column is a
/// feature (`schema` None) or the schema's (`schema` Some).
fn load_labeled(
    path: &Path,
    opts: &TableOptions,
    schema: Option<&[String]>,
    table: Option<&FeatureTable>,
    by: &str,
) -> Result<Loaded, WorkspaceError> {
    let input = |e: &dyn std::fmt::Display| WorkspaceError::Input(e.to_string());
    let (bytes, format, source) =
        data::read_bytes(path, opts.limits.max_bytes).map_err(|e| input(&e))?;
    let prov = provenance(path, &bytes, by);
    let Some(ft) = table else {
        let t = data::parse_table(&bytes, format, &source, opts, schema).map_err(|e| input(&e))?;
        return Ok(Loaded {
            table: t,
            provenance: prov,
        });
    };
    let t = match data::parse_labels(&bytes, format, &source, opts) {
        Ok(t) => {
            let index: HashMap<&str, usize> = ft
                .ids
                .iter()
                .enumerate()
                .map(|(i, id)| (id.as_str(), i))
                .collect();
            data::join_features(t, &ft.names, |id| {
                index.get(id).map(|&i| ft.row(i).to_vec())
            })
            .map_err(|e| input(&format!("{source}: {e}")))?
        }
        Err(e) if matches!(*e.kind, data::DataErrorKind::FeaturesNotAccepted { .. }) => {
            data::parse_table(&bytes, format, &source, opts, Some(&ft.names))
                .map_err(|e| input(&e))?
        }
        Err(e) => return Err(input(&e)),
    };
    Ok(Loaded {
        table: t,
        provenance: prov,
    })
}

/// [`create_workspace`] with a feature table and/or an imported pool (`labelweir init --features FILE
/// --pool FILE`). Everything is read and checked before anything is created.
pub fn create_workspace_with(
    dir: &std::path::Path,
    trusted: &std::path::Path,
    vendors: &[String],
    by: &str,
    extras: &InitExtras,
) -> Result<usize, WorkspaceError> {
    let cfg_text = config::render_with_vendors(vendors);
    let cfg = Config::parse_str(&cfg_text, &dir.join(CONFIG_FILE))
        .and_then(|c| c.validate().map(|_| c))
        .map_err(|e| WorkspaceError::Input(e.to_string()))?;
    let ws = Workspace::new(dir);
    if ws.config_file().exists() || ws.state().exists() {
        return Err(WorkspaceError::Input(format!(
            "{} already holds a workspace",
            dir.display()
        )));
    }
    let opts = team_file_options(&cfg);
    let feature_table = match &extras.features {
        Some(p) => {
            let (bytes, format, source) = data::read_bytes(p, opts.limits.max_bytes)
                .map_err(|e| WorkspaceError::Input(e.to_string()))?;
            let ft = FeatureTable::parse(&bytes, format, &source, &opts, None)
                .map_err(|e| WorkspaceError::Input(e.to_string()))?;
            Some((ft, provenance(p, &bytes, by)))
        }
        None => None,
    };
    let ft = feature_table.as_ref().map(|(t, _)| t);
    let Loaded {
        table,
        provenance: trusted_prov,
    } = load_labeled(trusted, &opts, None, ft, by)?;
    let classes = Classes::from_labels(&table.labels);
    if classes.len() < 2 {
        return Err(WorkspaceError::Input(
            "the trusted set needs items of at least two classes".into(),
        ));
    }
    let pool = match &extras.pool {
        Some(p) => {
            let l = load_labeled(p, &opts, Some(&table.feature_names), ft, by)?;
            let y = l
                .table
                .class_indices_in(&classes, &opts.label_column)
                .map_err(|e| WorkspaceError::Input(e.to_string()))?;
            Some((l, y))
        }
        None => None,
    };
    let standardizer = Standardizer::fit(&[table.features.view()])
        .map_err(|e| WorkspaceError::Input(e.to_string()))?;
    let feature_map = FeatureMap::new(standardizer, cfg.model.feature_map, cfg.model.seed)
        .map_err(|e| WorkspaceError::Config(e.to_string()))?;
    let meta = WorkspaceMeta {
        version: RECORD_VERSION,
        classes: classes.names().to_vec(),
        features: table.feature_names.clone(),
        feature_map,
        feature_map_setting: serde_json::to_value(cfg.model.feature_map)
            .map_err(|e| WorkspaceError::Config(e.to_string()))?,
        created_at: Utc::now(),
    };
    let now = Utc::now();
    let source = trusted_prov.source.clone();
    let items: Vec<TrustedItem> = (0..table.len())
        .map(|i| TrustedItem {
            version: RECORD_VERSION,
            id: table.ids[i].clone(),
            label: table.labels[i].clone(),
            features: table.features.row(i).to_vec(),
            weight: 1.0,
            added_by: by.to_string(),
            added_at: now,
            source: source.clone(),
        })
        .collect();
    std::fs::create_dir_all(dir).map_err(io(format!("create {}", dir.display())))?;
    prepare_folders(&ws, &cfg)?;
    for (d, mode) in [
        ("processing", 0o750),
        ("quarantine", 0o750),
        ("state", 0o700),
        ("notices", NOTICES_MODE),
    ] {
        std::fs::set_permissions(ws.folder(d), std::fs::Permissions::from_mode(mode))
            .map_err(io(format!("chmod {d}")))?;
    }
    for v in vendors {
        std::fs::set_permissions(
            ws.notices(v),
            std::fs::Permissions::from_mode(VENDOR_NOTICES_MODE),
        )
        .map_err(io(format!("chmod notices/{v}")))?;
    }
    crate::fsx::write_atomic(dir, CONFIG_FILE, cfg_text.as_bytes(), Some(0o640))
        .map_err(io(format!("write {}", ws.config_file().display())))?;
    let store = Store::open(&ws.state(), &cfg.store)?;
    let audit = AuditRecord::new(by, "init").detail(serde_json::json!({
        "vendors": vendors,
        "trusted_items": items.len(),
        "trusted_source": source,
        "trusted_sha256": trusted_prov.sha256,
        "classes": meta.classes,
        "features": meta.features.len(),
        "features_by_reference": feature_table.is_some(),
    }));
    store.initialise(&meta, &items, audit)?;
    if let Some((ft, prov)) = feature_table {
        store.set_feature_schema(&ft.names)?;
        store.import_features(&ft, prov)?;
    }
    if let Some((l, y)) = pool {
        store.import_pool(&l.table.ids, &y, l.table.features.view(), l.provenance)?;
    }
    Ok(items.len())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    #[allow(clippy::unnecessary_cast)] // the constant's C type differs between architectures
    fn remote_filesystems_are_told_apart_from_local_ones() {
        // Linux statfs(2) manual page, man-pages 6.03 (2022-10-30), the `f_type` table: the network and
        // FUSE filesystems...
        for (magic, kind) in [
            (0x6969_i64, "NFS"),                     // NFS_SUPER_MAGIC
            (0x517b, "SMB"),                         // SMB_SUPER_MAGIC
            (0xff53_4d42, "CIFS"),                   // CIFS_MAGIC_NUMBER
            (0xfe53_4d42, "SMB2"),                   // SMB2_MAGIC_NUMBER
            (0x6573_5546, "FUSE"),                   // FUSE_SUPER_MAGIC
            (0x0102_1997, "9p"),                     // V9FS_MAGIC
            (0x5346_414f, "AFS"),                    // AFS_SUPER_MAGIC
            (0x00c3_6400, "Ceph"), // CEPH_SUPER_MAGIC, include/uapi/linux/magic.h (not in the table)
            (0xff53_4d42_u32 as i32 as i64, "CIFS"), // a 32-bit f_type, sign-extended
        ] {
            assert_eq!(remote_filesystem_kind(magic), Some(kind), "{magic:#x}");
        }
        // ... and local ones from the same table, which must not count as remote.
        for magic in [
            0xef53_i64,  // EXT4_SUPER_MAGIC
            0x5846_5342, // XFS_SUPER_MAGIC
            0x9123_683e, // BTRFS_SUPER_MAGIC
            0x0102_1994, // TMPFS_MAGIC (one bit from V9FS_MAGIC)
            0x794c_7630, // OVERLAYFS_SUPER_MAGIC
            0x9fa0,      // PROC_SUPER_MAGIC
            0x6968,      // next to NFS_SUPER_MAGIC
            0,
        ] {
            assert_eq!(remote_filesystem_kind(magic), None, "{magic:#x}");
        }
        // The one magic number rustix exports agrees with the table.
        assert_eq!(
            remote_filesystem_kind(rustix::fs::NFS_SUPER_MAGIC as i64),
            Some("NFS")
        );
        // Through statfs: the test machine's temporary folder is local (ext4, xfs, btrfs, tmpfs or
        // overlayfs), and a missing folder is no remote one.
        let d = tempfile::tempdir().unwrap();
        assert_eq!(remote_filesystem(d.path()), None);
        assert_eq!(remote_filesystem(Path::new("/no/such/folder")), None);
    }
}
