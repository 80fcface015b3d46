//! Deciding a batch of files before anything of it is written, the same on both backends.
//!
//! A backend looks up what is stored ([`Lookups`]: content hashes, name ids, lots and their
//! samples), [`decide`] settles each file's outcome from that alone (stored, duplicate, or
//! refused with its conflicts) and which of its samples to write or replace, and the backend
//! writes what [`Batch`] says.

use std::collections::{HashMap, HashSet};

use super::{Conflict, FileOutcome, NewFile, NewSample, SampleDigest, StoredSample};

/// What is stored already, as far as a batch touches it.
#[derive(Default)]
pub(super) struct Lookups<'a> {
    /// Content hash → name of the file it was stored from.
    pub known: HashMap<String, String>,
    pub source_ids: HashMap<&'a str, i64>,
    /// (source, characteristic) → series id.
    pub series_ids: HashMap<(&'a str, &'a str), i64>,
    /// (source id, lot code) → lot id.
    pub lot_ids: HashMap<(i64, String), i64>,
    /// (lot id, series id) → the stored sample.
    pub stored: HashMap<(i64, i64), StoredSample>,
}

impl<'a> Lookups<'a> {
    /// The (source, characteristic) pairs of the batch, each once, in file order.
    pub fn series_named(files: &'a [NewFile]) -> Vec<(&'a str, &'a str)> {
        let mut seen = HashSet::new();
        files
            .iter()
            .flat_map(|f| &f.samples)
            .map(|s| (s.source.as_str(), s.characteristic.as_str()))
            .filter(|key| seen.insert(*key))
            .collect()
    }

    /// The lot codes of the batch by source id (each once), to look up stored lots.
    pub fn lots_wanted(&self, files: &'a [NewFile]) -> HashMap<i64, Vec<&'a str>> {
        let mut seen: HashSet<(i64, &str)> = HashSet::new();
        let mut by_source: HashMap<i64, Vec<&str>> = HashMap::new();
        for s in files.iter().flat_map(|f| &f.samples) {
            let key = (self.source_ids[s.source.as_str()], s.lot.as_str());
            if seen.insert(key) {
                by_source.entry(key.0).or_default().push(key.1);
            }
        }
        by_source
    }

    pub fn series_of(&self, s: &NewSample) -> i64 {
        self.series_ids[&(s.source.as_str(), s.characteristic.as_str())]
    }

    /// The stored lot of a sample, if its lot is stored.
    pub fn lot_of(&self, s: &NewSample) -> Option<i64> {
        let source_id = self.source_ids[s.source.as_str()];
        self.lot_ids.get(&(source_id, s.lot.clone())).copied()
    }
}

/// A sample to write: its index in its file, and the stored sample it replaces (boxed: a
/// year's export plans a hundred thousand samples, nearly all new).
pub(super) type Planned = (usize, Option<Box<StoredSample>>);

/// The outcome of every file of a batch and, for the files to store, their samples to write.
pub(super) struct Batch {
    outcomes: Vec<FileOutcome>,
    pub plans: Vec<Vec<Planned>>,
}

impl Batch {
    /// Indices of the files to store, in batch order.
    pub fn to_store(&self) -> Vec<usize> {
        (0..self.outcomes.len())
            .filter(|i| matches!(self.outcomes[*i], FileOutcome::Stored { .. }))
            .collect()
    }

    /// The outcomes, with the ids the stored files got.
    pub fn finish(self, file_ids: &HashMap<usize, i64>) -> Vec<FileOutcome> {
        self.outcomes
            .into_iter()
            .enumerate()
            .map(|(i, o)| match o {
                FileOutcome::Stored {
                    samples,
                    already_stored,
                    ..
                } => FileOutcome::Stored {
                    file_id: file_ids[&i],
                    samples,
                    already_stored,
                },
                other => other,
            })
            .collect()
    }

    /// The earliest sampling time of each lot the batch writes samples of, by (source id,
    /// lot code).
    pub fn lot_times<'a>(
        &self,
        files: &'a [NewFile],
        look: &Lookups<'_>,
    ) -> HashMap<(i64, &'a str), Option<&'a str>> {
        let mut times: HashMap<(i64, &str), Option<&str>> = HashMap::new();
        for i in self.to_store() {
            for (j, _) in &self.plans[i] {
                let s = &files[i].samples[*j];
                let key = (look.source_ids[s.source.as_str()], s.lot.as_str());
                let entry = times.entry(key).or_insert(None);
                *entry = earlier(*entry, s.earliest.as_deref());
            }
        }
        times
    }
}

/// Decides every file of a batch against what is stored and against the earlier files of
/// the batch. With `replace`, samples that differ from stored ones are planned as
/// replacements instead of refusing the file.
pub(super) fn decide(files: &[NewFile], look: &Lookups<'_>, replace: bool) -> Batch {
    let mut outcomes = Vec::with_capacity(files.len());
    let mut plans: Vec<Vec<Planned>> = vec![Vec::new(); files.len()];
    // Samples claimed by earlier files of this batch: (source, lot, characteristic) → digest.
    let mut claimed: HashMap<(&str, &str, &str), (&SampleDigest, &str)> = HashMap::new();
    let mut batch_hashes: HashMap<&str, &str> = HashMap::new();
    for (i, f) in files.iter().enumerate() {
        let first = look
            .known
            .get(&f.hash)
            .map(String::as_str)
            .or_else(|| batch_hashes.get(f.hash.as_str()).copied());
        if let Some(first) = first {
            outcomes.push(FileOutcome::Duplicate {
                first_name: first.to_string(),
            });
            continue;
        }
        let (plan, already, conflicts) = plan_file(f, look, &claimed, replace);
        if !conflicts.is_empty() {
            outcomes.push(FileOutcome::Conflict(conflicts));
            continue;
        }
        // Only later files of the batch look claims up (a file's own samples are distinct).
        for s in f.samples.iter().filter(|_| i + 1 < files.len()) {
            claimed.insert(
                (s.source.as_str(), s.lot.as_str(), s.characteristic.as_str()),
                (&s.digest, f.name.as_str()),
            );
        }
        batch_hashes.insert(f.hash.as_str(), f.name.as_str());
        outcomes.push(FileOutcome::Stored {
            file_id: 0,
            samples: plan.len(),
            already_stored: already,
        });
        plans[i] = plan;
    }
    Batch { outcomes, plans }
}

/// One file's samples to write, how many are stored already, and its conflicts.
fn plan_file(
    f: &NewFile,
    look: &Lookups<'_>,
    claimed: &HashMap<(&str, &str, &str), (&SampleDigest, &str)>,
    replace: bool,
) -> (Vec<Planned>, usize, Vec<Conflict>) {
    let mut conflicts = Vec::new();
    let mut plan = Vec::with_capacity(f.samples.len());
    let mut already = 0usize;
    let conflict = |s: &NewSample, stored_from: String| Conflict {
        source: s.source.clone(),
        lot: s.lot.clone(),
        characteristic: s.characteristic.clone(),
        stored_from,
    };
    for (j, s) in f.samples.iter().enumerate() {
        let key = (s.source.as_str(), s.lot.as_str(), s.characteristic.as_str());
        if let Some((digest, from)) = claimed.get(&key) {
            if **digest != s.digest {
                conflicts.push(conflict(s, format!("{from} (same batch)")));
            } else {
                already += 1;
            }
            continue;
        }
        let existing = look
            .lot_of(s)
            .and_then(|lot_id| look.stored.get(&(lot_id, look.series_of(s))));
        match existing {
            Some(st) if st.digest == s.digest.hex() => already += 1,
            Some(st) if replace => plan.push((j, Some(Box::new(st.clone())))),
            Some(st) => conflicts.push(conflict(s, st.file_name.clone())),
            None => plan.push((j, None)),
        }
    }
    (plan, already, conflicts)
}

fn earlier<'a>(a: Option<&'a str>, b: Option<&'a str>) -> Option<&'a str> {
    match (a, b) {
        (Some(x), Some(y)) => Some(if y < x { y } else { x }),
        (x, None) => x,
        (None, y) => y,
    }
}
