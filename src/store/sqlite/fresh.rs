//! Unit values just stored, kept in memory for the engine pass that follows.
//!
//! The engine reads the unit values of every undecided lot. Right after a batch is committed
//! those values are the ones the batch parsed, so reading them back (a seek and a JSON
//! unpacking per sample, about a quarter of a backfill's engine pass on the writer's thread)
//! can be skipped. An entry is taken, not copied, by the first read that asks for it, and is
//! used only when the sample still comes from the same stored file: a replacement, made by
//! this process or by another one on the same database, gives the sample another file, and
//! the values are then read from the database.

use std::collections::HashMap;

/// Most unit values kept (8 bytes each, so 32 MiB); a batch beyond that is read back.
pub(super) const FRESH_VALUES_MAX: usize = 4_000_000;

/// A batch with more values than this (a year's export in one file) is not kept: holding its
/// values twice while it is stored would raise the peak memory of a large file by a sixth.
pub(super) const FRESH_BATCH_MAX: usize = 200_000;

/// (seq, value) of every unit, in seq order, by sample id.
type ValuesById = HashMap<i64, Vec<(i64, f64)>>;

/// Values by sample id, each with the id of the file it was stored from.
#[derive(Default)]
pub(super) struct Fresh {
    by_sample: HashMap<i64, (i64, Vec<f64>)>,
    values: usize,
}

impl Fresh {
    /// Keeps the values of a committed batch's samples, given as (sample id, file id,
    /// values), while the total stays within [`FRESH_VALUES_MAX`]; none of a batch larger
    /// than [`FRESH_BATCH_MAX`]. A sample kept before is replaced.
    pub fn keep(&mut self, stored: &[(i64, i64, &[f64])]) {
        if stored.iter().map(|s| s.2.len()).sum::<usize>() > FRESH_BATCH_MAX {
            return;
        }
        for &(sample, file, values) in stored {
            if let Some((_, old)) = self.by_sample.remove(&sample) {
                self.values -= old.len();
            }
            if values.is_empty() || self.values + values.len() > FRESH_VALUES_MAX {
                continue;
            }
            self.values += values.len();
            self.by_sample.insert(sample, (file, values.to_vec()));
        }
    }

    /// Takes the kept values of `wanted` (sample id, file id) as (seq, value) in seq order,
    /// as the database read gives them; returns them with the sample ids not found (or kept
    /// from another file), which are to be read from the database.
    pub fn take(&mut self, wanted: &[(i64, i64)]) -> (ValuesById, Vec<i64>) {
        let mut found = HashMap::with_capacity(wanted.len());
        let mut missing = Vec::new();
        for &(sample, file) in wanted {
            match self.by_sample.remove(&sample) {
                Some((kept_file, values)) => {
                    self.values -= values.len();
                    if kept_file == file {
                        found.insert(sample, (0..).zip(values).collect());
                    } else {
                        missing.push(sample);
                    }
                }
                None => missing.push(sample),
            }
        }
        (found, missing)
    }

    /// Unit values kept.
    #[cfg(test)]
    pub fn len(&self) -> usize {
        self.values
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_are_taken_once_and_only_from_the_same_file() {
        let mut fresh = Fresh::default();
        fresh.keep(&[
            (1, 10, &[1.5, 2.5][..]),
            (2, 10, &[3.0][..]),
            (3, 11, &[4.0][..]),
        ]);
        assert_eq!(fresh.len(), 4);
        // Sample 2 was replaced since (another file); sample 4 was never kept.
        let (found, missing) = fresh.take(&[(1, 10), (2, 12), (4, 10)]);
        assert_eq!(found.len(), 1);
        assert_eq!(found[&1], vec![(0, 1.5), (1, 2.5)]);
        assert_eq!(missing, vec![2, 4]);
        // Taken entries are gone, the mismatched one too; sample 3 stays.
        assert_eq!(fresh.len(), 1);
        let (found, missing) = fresh.take(&[(1, 10), (3, 11)]);
        assert_eq!(missing, vec![1]);
        assert_eq!(found[&3], vec![(0, 4.0)]);
        assert_eq!(fresh.len(), 0);
    }

    #[test]
    fn keeping_again_replaces_and_the_bound_holds() {
        let mut fresh = Fresh::default();
        fresh.keep(&[(1, 10, &[1.0, 2.0][..])]);
        fresh.keep(&[(1, 12, &[5.0][..])]);
        assert_eq!(fresh.len(), 1);
        let (found, _) = fresh.take(&[(1, 12)]);
        assert_eq!(found[&1], vec![(0, 5.0)]);

        // Filled to one value below the bound, in batches within the batch bound.
        let big = vec![0.5; FRESH_BATCH_MAX];
        let mut id = 100;
        while fresh.len() + FRESH_BATCH_MAX < FRESH_VALUES_MAX {
            fresh.keep(&[(id, 1, &big[..])]);
            id += 1;
        }
        let fill = vec![0.5; FRESH_VALUES_MAX - fresh.len() - 1];
        fresh.keep(&[(id, 1, &fill[..])]);
        fresh.keep(&[(8, 1, &[1.0, 2.0][..]), (9, 1, &[3.0][..])]);
        // The second sample would pass the bound and is left to be read back; the third fits.
        assert_eq!(fresh.len(), FRESH_VALUES_MAX);
        let (found, missing) = fresh.take(&[(8, 1), (9, 1)]);
        assert_eq!(missing, vec![8]);
        assert!(found.contains_key(&9));
    }

    #[test]
    fn a_batch_above_the_batch_bound_is_not_kept() {
        let mut fresh = Fresh::default();
        let half = vec![1.0; FRESH_BATCH_MAX / 2 + 1];
        fresh.keep(&[(1, 1, &half[..]), (2, 1, &half[..])]);
        assert_eq!(fresh.len(), 0);
        fresh.keep(&[(1, 1, &half[..])]);
        assert_eq!(fresh.len(), half.len());
    }
}
