//! The store's feature table (features by reference) and the provenance of imported pools.
//!
//! # Trees and keys
//!
//! * `features`: item id (UTF-8 bytes) → `import sequence (u64, big-endian) | d × f32 (little-endian)`:
//!   the row's values, stored as 32-bit floats, and the import that wrote them last.
//! * `feature_meta`: `names` → JSON list of the feature names (present only in by-reference mode; written
//!   once, at `init`); `import_seq` → the last import sequence number (u64, big-endian).
//! * `feature_imports`: import sequence (u64, big-endian) → JSON [`FeatureImport`] (source file, its
//!   SHA-256, who, when, rows, new and replaced ids).
//! * `pool_imports`: the pool-entry batch id of an imported chunk (`pool-import-N-C`) → JSON
//!   [`PoolImport`] (source file, SHA-256, who, when, items).
//!
//! An import is one flushed transaction over `features`, `feature_meta`, `feature_imports` and the audit
//! trail, so a crash leaves either all of a file's rows or none. Only the team's paths write here (`init
//! --features`, `labelweir features add`, the `features/incoming/` folder); nothing in a vendor's delivery
//! does.
//!
//! **Duplicate ids across files: the last import wins**, and it is audited: the import record and its
//! audit record list how many ids it replaced and how many of those changed value (the first 20 of them
//! by id). Within one file an id may appear only once (the file is refused otherwise).

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};
use sled::transaction::{ConflictableTransactionError, TransactionError};
use sled::Transactional;

use super::{
    dec, decoded, enc, u64_of, AuditRecord, PoolEntry, Store, StoreError, T_AUDIT, T_META,
};
use super::{META_POOL_SEQ, T_POOL, T_POOL_INDEX};
use crate::data::FeatureTable;

const T_FEATURES: &str = "features";
const T_FEATURE_META: &str = "feature_meta";
const T_FEATURE_IMPORTS: &str = "feature_imports";
const T_POOL_IMPORTS: &str = "pool_imports";
const KEY_NAMES: &[u8] = b"names";
const KEY_IMPORT_SEQ: &[u8] = b"import_seq";
/// Items per pool entry when a pool is imported (one sled value each).
pub const POOL_IMPORT_CHUNK: usize = 5_000;

/// Where a file imported into the store came from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Provenance {
    /// The file's name (escaped), as given to the command or found in the folder.
    pub source: String,
    /// SHA-256 of its bytes, lower-case hex.
    pub sha256: String,
    /// Who imported it (the `--by` of the command, or `features/incoming` for the folder).
    pub by: String,
    /// When.
    pub at: DateTime<Utc>,
}

/// One import into the feature table.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FeatureImport {
    /// Record version.
    pub version: u32,
    /// Import sequence number (1, 2, ...).
    pub seq: u64,
    /// Where the rows came from.
    pub provenance: Provenance,
    /// Rows in the file.
    pub rows: usize,
    /// Ids the table did not have before.
    pub added: usize,
    /// Ids the table had (their rows now come from this import).
    pub replaced: usize,
    /// Of the replaced ids, those whose values changed.
    pub changed: usize,
    /// The first 20 changed ids.
    pub changed_ids: Vec<String>,
}

/// One imported pool chunk's provenance.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct PoolImport {
    /// Record version.
    pub version: u32,
    /// Where the pool came from.
    pub provenance: Provenance,
    /// Items in this chunk.
    pub items: usize,
}

fn tx_result<R>(
    op: &'static str,
    r: Result<R, TransactionError<StoreError>>,
) -> Result<R, StoreError> {
    match r {
        Ok(r) => Ok(r),
        Err(TransactionError::Abort(e)) => Err(e),
        Err(TransactionError::Storage(e)) => Err(StoreError::Sled { op, source: e }),
    }
}

fn encode_row(seq: u64, values: &[f32]) -> Vec<u8> {
    let mut v = Vec::with_capacity(8 + 4 * values.len());
    v.extend_from_slice(&seq.to_be_bytes());
    for f in values {
        v.extend_from_slice(&f.to_le_bytes());
    }
    v
}

fn decode_row(key: &[u8], bytes: &[u8]) -> Result<(u64, Vec<f32>), StoreError> {
    if bytes.len() < 8 || (bytes.len() - 8) % 4 != 0 {
        return Err(StoreError::Corrupt {
            what: "feature row",
            key: String::from_utf8_lossy(key).into_owned(),
            message: format!("{} bytes", bytes.len()),
        });
    }
    let seq = u64_of(Some(sled::IVec::from(&bytes[..8])));
    let values = bytes[8..]
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect();
    Ok((seq, values))
}

impl Store {
    fn named(&self, name: &'static str) -> Result<sled::Tree, StoreError> {
        self.db
            .open_tree(name)
            .map_err(StoreError::sled("open tree"))
    }

    /// The feature names of the workspace's feature table when it takes features by reference, `None`
    /// when deliveries carry their own features.
    pub fn feature_schema(&self) -> Result<Option<Vec<String>>, StoreError> {
        self.named(T_FEATURE_META)?
            .get(KEY_NAMES)
            .map_err(StoreError::sled("read feature meta"))?
            .map(|v| dec("feature meta", KEY_NAMES, &v))
            .transpose()
    }

    /// Put the workspace in by-reference mode with these feature names (at `init`, once).
    pub fn set_feature_schema(&self, names: &[String]) -> Result<(), StoreError> {
        let meta = self.named(T_FEATURE_META)?;
        let v = enc("feature meta", &names)?;
        let r = meta.compare_and_swap(KEY_NAMES, None as Option<&[u8]>, Some(v));
        match r.map_err(StoreError::sled("write feature meta"))? {
            Ok(()) => self.flush(),
            Err(_) => Err(StoreError::Layout {
                path: self.path.clone(),
                message: "the feature table's schema is already set".into(),
            }),
        }
    }

    /// The stored features of one item (32-bit floats, in the schema's order).
    pub fn feature_row(&self, id: &str) -> Result<Option<Vec<f32>>, StoreError> {
        self.named(T_FEATURES)?
            .get(id.as_bytes())
            .map_err(StoreError::sled("read feature row"))?
            .map(|v| decode_row(id.as_bytes(), &v).map(|(_, x)| x))
            .transpose()
    }

    /// A lookup for [`crate::data::join_features`]: one open tree, read per id; a corrupt row reads as
    /// missing (and is logged).
    pub fn feature_lookup(&self) -> Result<impl FnMut(&str) -> Option<Vec<f32>>, StoreError> {
        let tree = self.named(T_FEATURES)?;
        Ok(move |id: &str| match tree.get(id.as_bytes()) {
            Ok(Some(v)) => match decode_row(id.as_bytes(), &v) {
                Ok((_, x)) => Some(x),
                Err(e) => {
                    tracing::error!(error = %e, "feature row unreadable");
                    None
                }
            },
            Ok(None) => None,
            Err(e) => {
                tracing::error!(error = %e, "feature table unreadable");
                None
            }
        })
    }

    /// Rows in the feature table.
    pub fn feature_rows(&self) -> Result<usize, StoreError> {
        Ok(self.named(T_FEATURES)?.len())
    }

    /// Every import into the feature table, oldest first.
    pub fn feature_imports(&self) -> Result<Vec<FeatureImport>, StoreError> {
        decoded(
            self.named(T_FEATURE_IMPORTS)?.iter(),
            "scan feature imports",
            "feature import",
        )
        .collect()
    }

    /// Import a feature table's rows (last writer wins for ids already present, see the module
    /// documentation) with its provenance and an audit record, in one flushed transaction. The table's
    /// names must be the workspace's feature schema, in order.
    pub fn import_features(
        &self,
        table: &FeatureTable,
        provenance: Provenance,
    ) -> Result<FeatureImport, StoreError> {
        let schema = self.feature_schema()?.ok_or_else(|| StoreError::Layout {
            path: self.path.clone(),
            message: "this workspace does not take features by reference (create it with `labelweir init --features FILE`)".into(),
        })?;
        if schema != table.names {
            return Err(StoreError::Encode {
                what: "feature table",
                message: "its columns are not the workspace's feature schema".into(),
            });
        }
        let features = self.named(T_FEATURES)?;
        let meta = self.named(T_FEATURE_META)?;
        let imports = self.named(T_FEATURE_IMPORTS)?;
        let audit_tree = &self.trees[T_AUDIT];
        let (mut replaced, mut changed, mut changed_ids) = (0usize, 0usize, Vec::new());
        for (i, id) in table.ids.iter().enumerate() {
            if let Some(v) = features
                .get(id.as_bytes())
                .map_err(StoreError::sled("read feature row"))?
            {
                replaced += 1;
                let (_, old) = decode_row(id.as_bytes(), &v)?;
                if old
                    .iter()
                    .map(|f| f.to_bits())
                    .ne(table.row(i).iter().map(|f| f.to_bits()))
                {
                    changed += 1;
                    if changed_ids.len() < 20 {
                        changed_ids.push(id.clone());
                    }
                }
            }
        }
        let seq = u64_of(
            meta.get(KEY_IMPORT_SEQ)
                .map_err(StoreError::sled("read feature meta"))?,
        ) + 1;
        let record = FeatureImport {
            version: super::RECORD_VERSION,
            seq,
            provenance: provenance.clone(),
            rows: table.len(),
            added: table.len() - replaced,
            replaced,
            changed,
            changed_ids: changed_ids.clone(),
        };
        let audit = self.prepare_audit(
            AuditRecord::new(&provenance.by, "features import")
                .reason(if changed > 0 {
                    "replaced rows with new values (last import wins)"
                } else {
                    "rows added"
                })
                .detail(
                    serde_json::to_value(&record).map_err(|e| StoreError::Encode {
                        what: "audit",
                        message: e.to_string(),
                    })?,
                ),
        )?;
        let rec_v = enc("feature import", &record)?;
        let rows: Vec<(Vec<u8>, Vec<u8>)> = (0..table.len())
            .map(|i| {
                (
                    table.ids[i].as_bytes().to_vec(),
                    encode_row(seq, table.row(i)),
                )
            })
            .collect();
        let r = (&features, &meta, &imports, audit_tree).transaction(|(f, m, im, a)| {
            for (k, v) in &rows {
                f.insert(k.as_slice(), v.as_slice())?;
            }
            m.insert(KEY_IMPORT_SEQ, &seq.to_be_bytes())?;
            im.insert(&seq.to_be_bytes(), rec_v.as_slice())?;
            a.insert(&audit.0, audit.1.as_slice())?;
            f.flush();
            Ok::<_, ConflictableTransactionError<StoreError>>(())
        });
        tx_result("import features", r)?;
        Ok(record)
    }

    /// Add an existing training pool (at `init`): the items go into the pool in chunks of
    /// [`POOL_IMPORT_CHUNK`], each chunk a pool entry with batch id `pool-import-N-C` and vendor
    /// `pool-import`, its provenance in `pool_imports`, and one audit record for the whole import; one
    /// flushed transaction. Returns the number of items.
    pub fn import_pool(
        &self,
        ids: &[String],
        labels: &[usize],
        x: ndarray::ArrayView2<'_, f64>,
        provenance: Provenance,
    ) -> Result<usize, StoreError> {
        let pool_imports = self.named(T_POOL_IMPORTS)?;
        let n_import = pool_imports
            .iter()
            .keys()
            .filter_map(Result::ok)
            .filter_map(|k| {
                let k = String::from_utf8_lossy(&k).into_owned();
                k.strip_prefix("pool-import-")?
                    .split('-')
                    .next()?
                    .parse::<u64>()
                    .ok()
            })
            .max()
            .unwrap_or(0)
            + 1;
        let d = x.ncols();
        let mut chunks = Vec::new();
        for (c, start) in (0..ids.len()).step_by(POOL_IMPORT_CHUNK).enumerate() {
            let end = (start + POOL_IMPORT_CHUNK).min(ids.len());
            let batch_id = format!("pool-import-{n_import}-{:04}", c + 1);
            let entry = PoolEntry {
                batch_id: batch_id.clone(),
                vendor: "pool-import".into(),
                ids: ids[start..end].to_vec(),
                labels: labels[start..end].to_vec(),
                x: x.slice(ndarray::s![start..end, ..])
                    .iter()
                    .copied()
                    .collect(),
                n_features: d,
            };
            let prov = enc(
                "pool import",
                &PoolImport {
                    version: super::RECORD_VERSION,
                    provenance: provenance.clone(),
                    items: end - start,
                },
            )?;
            chunks.push((batch_id, entry.encode()?, prov));
        }
        let audit = self.prepare_audit(AuditRecord::new(&provenance.by, "pool import").detail(
            serde_json::json!({
                "source": provenance.source,
                "sha256": provenance.sha256,
                "items": ids.len(),
                "entries": chunks.iter().map(|c| c.0.clone()).collect::<Vec<_>>(),
            }),
        ))?;
        let trees = (
            &self.trees[T_POOL],
            &self.trees[T_POOL_INDEX],
            &self.trees[T_META],
            &self.trees[T_AUDIT],
            &pool_imports,
        );
        let r = trees.transaction(|(pool, index, meta, a, pi)| {
            for (batch_id, entry, prov) in &chunks {
                let seq = u64_of(meta.get(META_POOL_SEQ)?) + 1;
                meta.insert(META_POOL_SEQ, &seq.to_be_bytes())?;
                pool.insert(&seq.to_be_bytes(), entry.as_slice())?;
                index.insert(batch_id.as_bytes(), &seq.to_be_bytes())?;
                pi.insert(batch_id.as_bytes(), prov.as_slice())?;
            }
            a.insert(&audit.0, audit.1.as_slice())?;
            pool.flush();
            Ok::<_, ConflictableTransactionError<StoreError>>(())
        });
        tx_result("import pool", r)?;
        Ok(ids.len())
    }

    /// The provenance of every imported pool chunk, by its pool-entry batch id.
    pub fn pool_imports(&self) -> Result<Vec<(String, PoolImport)>, StoreError> {
        super::decoded_by_name(
            self.named(T_POOL_IMPORTS)?.iter(),
            "scan pool imports",
            "pool import",
        )
        .collect()
    }
}
