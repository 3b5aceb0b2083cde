//! The store's trusted side: the expert-verified items every batch is judged against. Written only by
//! review commands, in one flushed transaction with their audit records; nothing on the ingest path can.

use super::{decoded, enc, AuditRecord, Store, StoreError, TrustedItem, T_AUDIT, T_TRUSTED};

impl Store {
    /// Every trusted item, in id order.
    pub fn trusted_items(&self) -> Result<Vec<TrustedItem>, StoreError> {
        decoded(self.trees[T_TRUSTED].iter(), "scan trusted", "trusted item").collect()
    }

    /// Add or replace trusted items and remove others, with audit records, in one flushed transaction.
    /// Only review commands call this; nothing on the ingest path can.
    pub fn update_trusted(
        &self,
        add: &[TrustedItem],
        remove: &[String],
        audit: Vec<AuditRecord>,
    ) -> Result<(), StoreError> {
        let adds: Vec<(Vec<u8>, Vec<u8>)> = add
            .iter()
            .map(|t| Ok((t.id.as_bytes().to_vec(), enc("trusted item", t)?)))
            .collect::<Result<_, StoreError>>()?;
        let mut audits = Vec::new();
        for a in audit {
            audits.push(self.prepare_audit(a)?);
        }
        self.run_tx("update trusted", |t| {
            for id in remove {
                t[T_TRUSTED].remove(id.as_bytes())?;
            }
            for (k, v) in &adds {
                t[T_TRUSTED].insert(k.as_slice(), v.as_slice())?;
            }
            for (k, v) in &audits {
                t[T_AUDIT].insert(k, v.as_slice())?;
            }
            Ok(())
        })
    }
}
