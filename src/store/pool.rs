//! The store's pool side: the accepted items, the saved pool summary and its epoch, and each vendor's
//! history.

use super::{
    dec, enc, u64_of, AuditRecord, BatchRecord, BatchState, PoolChange, PoolEntry, SavedSummary,
    Store, StoreError, VendorHistory, META_EPOCH, SUMMARY_KEY, T_AUDIT, T_HISTORY, T_META, T_POOL,
    T_POOL_INDEX,
};

impl Store {
    /// Pool entries with sequence number greater than `after`, in order, with their sequence numbers.
    pub fn pool_entries_after(&self, after: u64) -> Result<Vec<(u64, PoolEntry)>, StoreError> {
        self.trees[T_POOL]
            .range((after + 1).to_be_bytes()..)
            .map(|kv| {
                let (k, v) = kv.map_err(StoreError::sled("scan pool"))?;
                let seq = u64_of(Some(k));
                Ok((seq, PoolEntry::decode(&seq.to_string(), &v)?))
            })
            .collect()
    }

    /// Visit every pool entry in sequence order, one decoded entry at a time (memory follows the largest
    /// entry, not the pool); the first error from `f` stops the walk and is returned.
    pub fn for_each_pool_entry<E: From<StoreError>>(
        &self,
        mut f: impl FnMut(u64, PoolEntry) -> Result<(), E>,
    ) -> Result<(), E> {
        for kv in self.trees[T_POOL].iter() {
            let (k, v) = kv.map_err(StoreError::sled("scan pool"))?;
            let seq = u64_of(Some(k));
            f(seq, PoolEntry::decode(&seq.to_string(), &v)?)?;
        }
        Ok(())
    }

    /// Sequence numbers of the pool entries after `after`, in order (keys only; nothing is decoded).
    pub fn pool_seqs_after(&self, after: u64) -> Result<Vec<u64>, StoreError> {
        self.trees[T_POOL]
            .range((after + 1).to_be_bytes()..)
            .keys()
            .map(|k| Ok(u64_of(Some(k.map_err(StoreError::sled("scan pool"))?))))
            .collect()
    }

    /// The whole pool as one `(x, y)` pair (for an exact refresh), plus the highest sequence included.
    pub fn pool_matrix(
        &self,
        n_features: usize,
    ) -> Result<(ndarray::Array2<f64>, Vec<usize>, u64), StoreError> {
        let mut x = Vec::new();
        let mut y = Vec::new();
        let mut last = 0;
        for kv in self.trees[T_POOL].iter() {
            let (k, v) = kv.map_err(StoreError::sled("scan pool"))?;
            let seq = u64_of(Some(k));
            let e = PoolEntry::decode(&seq.to_string(), &v)?;
            if e.n_features != n_features {
                return Err(StoreError::Corrupt {
                    what: "pool",
                    key: seq.to_string(),
                    message: format!("{} features, expected {n_features}", e.n_features),
                });
            }
            x.extend_from_slice(&e.x);
            y.extend_from_slice(&e.labels);
            last = seq;
        }
        let n = y.len();
        let x = ndarray::Array2::from_shape_vec((n, n_features), x).map_err(|e| {
            StoreError::Corrupt {
                what: "pool",
                key: "*".into(),
                message: e.to_string(),
            }
        })?;
        Ok((x, y, last))
    }

    /// Number of items in the pool.
    pub fn pool_items(&self) -> Result<u64, StoreError> {
        let mut n = 0u64;
        for kv in self.trees[T_POOL].iter() {
            let (k, v) = kv.map_err(StoreError::sled("scan pool"))?;
            n += PoolEntry::decode(&u64_of(Some(k)).to_string(), &v)?
                .ids
                .len() as u64;
        }
        Ok(n)
    }

    /// Batch ids whose items are in the pool, in pool order.
    pub fn pool_batches(&self) -> Result<Vec<String>, StoreError> {
        let mut v: Vec<(u64, String)> = self.trees[T_POOL_INDEX]
            .iter()
            .map(|kv| {
                let (k, s) = kv.map_err(StoreError::sled("scan pool index"))?;
                Ok((u64_of(Some(s)), String::from_utf8_lossy(&k).into_owned()))
            })
            .collect::<Result<_, StoreError>>()?;
        v.sort();
        Ok(v.into_iter().map(|(_, b)| b).collect())
    }

    /// The pool entry of one batch, if its items are in the pool.
    pub fn pool_entry_of(&self, batch_id: &str) -> Result<Option<PoolEntry>, StoreError> {
        let Some(seq) = self.trees[T_POOL_INDEX]
            .get(batch_id.as_bytes())
            .map_err(StoreError::sled("read pool index"))?
        else {
            return Ok(None);
        };
        let key = u64_of(Some(seq.clone()));
        self.trees[T_POOL]
            .get(seq)
            .map_err(StoreError::sled("read pool"))?
            .map(|v| PoolEntry::decode(&key.to_string(), &v))
            .transpose()
    }

    /// The pool epoch: bumped whenever items leave the pool.
    pub fn pool_epoch(&self) -> Result<u64, StoreError> {
        Ok(u64_of(
            self.trees[T_META]
                .get(META_EPOCH)
                .map_err(StoreError::sled("read epoch"))?,
        ))
    }

    /// The saved pool summary, if any.
    pub fn saved_summary(&self) -> Result<Option<SavedSummary>, StoreError> {
        self.summary
            .get(SUMMARY_KEY)
            .map_err(StoreError::sled("read summary"))?
            .map(|v| dec("summary", SUMMARY_KEY, &v))
            .transpose()
    }

    /// Save the pool summary (flushed).
    pub fn save_summary(&self, s: &SavedSummary) -> Result<(), StoreError> {
        let v = enc("summary", s)?;
        self.summary
            .insert(SUMMARY_KEY, v)
            .map_err(StoreError::sled("write summary"))?;
        self.summary.flush().map_err(StoreError::sled("flush"))?;
        Ok(())
    }

    // ----- vendor history -----

    /// [`Store::transition`] that also updates the batch's vendor's history in the same flushed
    /// transaction: `history` runs inside it on the history as stored (and again if the transaction
    /// retries), so a release joins the vendor's record exactly when the release is recorded.
    ///
    /// A batch of the same vendor that the daemon is deciding at that very moment records the history it
    /// read before; the release's contribution is then lost for that vendor's record (as for a drift
    /// reset, see `review::drift`), never half-written.
    #[allow(clippy::too_many_arguments)]
    pub fn transition_with_history(
        &self,
        batch_id: &str,
        expect: &[BatchState],
        to: BatchState,
        pool: PoolChange,
        audit: Vec<AuditRecord>,
        edit: impl Fn(&mut BatchRecord),
        history: impl Fn(&mut VendorHistory),
    ) -> Result<BatchRecord, StoreError> {
        self.transition_inner(
            batch_id,
            expect,
            to,
            pool,
            audit,
            &edit,
            Some(&history),
            None,
        )
    }

    /// [`Store::transition`] refused, inside the transaction, when `refuse` says why on the record as
    /// stored ([`StoreError::Refused`]): a change prepared from what a request read before the transaction
    /// (a batch's pool entry, its held items) is refused when another writer changed that meanwhile,
    /// instead of overwriting the other's change.
    #[allow(clippy::too_many_arguments)]
    pub fn transition_unless(
        &self,
        batch_id: &str,
        expect: &[BatchState],
        to: BatchState,
        pool: PoolChange,
        audit: Vec<AuditRecord>,
        refuse: impl Fn(&BatchRecord) -> Option<String>,
        edit: impl Fn(&mut BatchRecord),
    ) -> Result<BatchRecord, StoreError> {
        self.transition_inner(
            batch_id,
            expect,
            to,
            pool,
            audit,
            &edit,
            None,
            Some(&refuse),
        )
    }

    /// [`Store::transition_with_history`] refused, inside the transaction, when `refuse` says why on the
    /// record as stored ([`StoreError::Refused`]): a change that must happen once (an answer to a spot
    /// check) cannot happen twice when two requests race, since each read the record before the other
    /// wrote it and the second's transaction retries on the first's write. `pool` changes the batch's
    /// pool entry in the same transaction (an answer that takes contradicted items out of the pool).
    #[allow(clippy::too_many_arguments)]
    pub fn transition_with_history_unless(
        &self,
        batch_id: &str,
        expect: &[BatchState],
        to: BatchState,
        pool: PoolChange,
        audit: Vec<AuditRecord>,
        refuse: impl Fn(&BatchRecord) -> Option<String>,
        edit: impl Fn(&mut BatchRecord),
        history: impl Fn(&mut VendorHistory),
    ) -> Result<BatchRecord, StoreError> {
        self.transition_inner(
            batch_id,
            expect,
            to,
            pool,
            audit,
            &edit,
            Some(&history),
            Some(&refuse),
        )
    }

    /// A vendor's history (empty if none yet).
    pub fn vendor_history(&self, vendor: &str) -> Result<VendorHistory, StoreError> {
        Ok(self.trees[T_HISTORY]
            .get(vendor.as_bytes())
            .map_err(StoreError::sled("read history"))?
            .map(|v| dec("history", vendor.as_bytes(), &v))
            .transpose()?
            .unwrap_or_default())
    }

    /// Every vendor with a stored history, and that history, in vendor order — including vendors the
    /// configuration no longer lists (a spot-check recall pending for one must still be finished).
    pub fn vendor_histories(&self) -> Result<Vec<(String, VendorHistory)>, StoreError> {
        super::decoded_by_name(self.trees[T_HISTORY].iter(), "scan histories", "history").collect()
    }

    /// Edit a vendor's history in place (flushed): `edit` runs inside the transaction on the history as
    /// stored (again if the transaction retries), so nothing another writer put there meanwhile is lost.
    pub fn edit_vendor_history(
        &self,
        vendor: &str,
        edit: impl Fn(&mut VendorHistory),
    ) -> Result<(), StoreError> {
        self.run_tx("edit history", |t| {
            super::edit_history_in(&t[T_HISTORY], vendor, &edit)
        })
    }

    /// Replace a vendor's history (flushed), e.g. after a reviewer resets its drift statistic.
    pub fn set_vendor_history(
        &self,
        vendor: &str,
        h: &VendorHistory,
        audit: AuditRecord,
    ) -> Result<(), StoreError> {
        let v = enc("history", h)?;
        let a = self.prepare_audit(audit)?;
        let vendor = vendor.to_string();
        self.run_tx("write history", |t| {
            t[T_HISTORY].insert(vendor.as_bytes(), v.as_slice())?;
            t[T_AUDIT].insert(&a.0, a.1.as_slice())?;
            Ok(())
        })
    }
}
