//! The unit serials of one file, each text stored once in one arena.
//!
//! A year's export names a million units; a `String` per value (or per serial in a map) cost
//! more than the file itself. Here a serial costs its bytes, one end offset and one slot of
//! the lookup table.

use std::hash::{BuildHasher, BuildHasherDefault};

use hashbrown::HashTable;

use super::FastHasher;

/// Id of "no serial" (no `unit` column, or an empty cell).
pub const NO_UNIT: u32 = u32::MAX;

/// Interned unit serials: id → text, text → id.
#[derive(Default, Clone)]
pub struct Serials {
    text: String,
    /// End offset in `text` of each serial, by id.
    ends: Vec<usize>,
    table: HashTable<u32>,
}

impl std::fmt::Debug for Serials {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list()
            .entries((0..self.len()).map(|i| self.at(i)))
            .finish()
    }
}

impl PartialEq for Serials {
    fn eq(&self, other: &Self) -> bool {
        self.text == other.text && self.ends == other.ends
    }
}

fn hash(s: &str) -> u64 {
    BuildHasherDefault::<FastHasher>::default().hash_one(s)
}

impl Serials {
    /// Number of distinct serials.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    fn at(&self, i: usize) -> &str {
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        &self.text[start..self.ends[i]]
    }

    /// The serial of `id`; `None` for [`NO_UNIT`].
    pub fn get(&self, id: u32) -> Option<&str> {
        let i = usize::try_from(id).ok()?;
        (id != NO_UNIT && i < self.ends.len()).then(|| self.at(i))
    }

    /// The id of `s`, adding it when new.
    pub fn intern(&mut self, s: &str) -> u32 {
        let h = hash(s);
        let Serials { text, ends, table } = self;
        let at = |i: u32| {
            let i = i as usize;
            let start = if i == 0 { 0 } else { ends[i - 1] };
            &text[start..ends[i]]
        };
        if let Some(&id) = table.find(h, |&id| at(id) == s) {
            return id;
        }
        // Ids stay below NO_UNIT: a file with four billion distinct serials is not a lot file.
        let id = u32::try_from(ends.len())
            .unwrap_or(NO_UNIT - 1)
            .min(NO_UNIT - 1);
        text.push_str(s);
        ends.push(text.len());
        let (text, ends) = (&*text, &*ends);
        table.insert_unique(h, id, |&i| {
            let i = i as usize;
            let start = if i == 0 { 0 } else { ends[i - 1] };
            hash(&text[start..ends[i]])
        });
        id
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn interns_each_serial_once() {
        let mut s = Serials::default();
        let a = s.intern("U-001");
        let b = s.intern("U-002");
        assert_ne!(a, b);
        assert_eq!(s.intern("U-001"), a);
        assert_eq!(s.get(a), Some("U-001"));
        assert_eq!(s.get(b), Some("U-002"));
        assert_eq!(s.get(NO_UNIT), None);
        assert_eq!(s.len(), 2);
    }

    #[test]
    fn many_serials_round_trip() {
        let mut s = Serials::default();
        let ids: Vec<u32> = (0..20_000).map(|i| s.intern(&format!("L{i:05}"))).collect();
        for (i, id) in ids.iter().enumerate() {
            assert_eq!(s.get(*id), Some(format!("L{i:05}").as_str()));
            assert_eq!(s.intern(&format!("L{i:05}")), *id);
        }
        assert_eq!(s.intern(""), 20_000);
        assert_eq!(s.get(20_000), Some(""));
    }
}
