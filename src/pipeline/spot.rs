//! The spot-check file of an accepted batch: `spot-checks/<batch>.csv`, the items the policy picked for
//! the trusted-set experts ([`crate::policy::spot`]), with their features and an empty label column for
//! the experts to fill in. The vendor's labels are not in it: the experts label blind. Written when the
//! batch is filed (best effort, again at every filing of the batch; the record in the store is the truth,
//! and `spot-check list` names what is waiting).

use std::path::PathBuf;

use crate::config::Config;
use crate::store::BatchRecord;
use crate::workspace::Workspace;

/// The file name of a batch's spot check.
pub fn file_name(batch: &str) -> String {
    format!("{batch}.csv")
}

/// Write the spot-check file of `record` (if it has an unanswered spot check) with the workspace's
/// feature names; returns its path, or `None` when there is nothing to ask.
pub fn write_request(
    ws: &Workspace,
    config: &Config,
    feature_names: &[String],
    record: &BatchRecord,
) -> std::io::Result<Option<PathBuf>> {
    let Some(check) = record.spot_check.as_ref().filter(|c| c.answered.is_none()) else {
        return Ok(None);
    };
    let ids: Vec<String> = check.items.iter().map(|i| i.id.clone()).collect();
    let blank = vec![String::new(); ids.len()];
    let width = check.items.first().map_or(0, |i| i.features.len());
    let flat: Vec<f64> = check
        .items
        .iter()
        .flat_map(|i| i.features.iter().copied())
        .collect();
    let x = ndarray::Array2::from_shape_vec((ids.len(), width), flat)
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidData, e.to_string()))?;
    let mut bytes = Vec::new();
    crate::data::write_csv(
        &mut bytes,
        (
            config.schema.id_column.as_str(),
            config.schema.label_column.as_str(),
        ),
        &ids,
        &blank,
        feature_names,
        x.view(),
    )?;
    let dir = ws.spot_checks();
    std::fs::create_dir_all(&dir)?;
    crate::fsx::write_atomic(&dir, &file_name(&record.id), &bytes, Some(0o640)).map(Some)
}
