//! The unit key index: each unit's key stored once, looked up by its bytes.

use std::hash::{BuildHasher, RandomState};

use hashbrown::HashTable;

/// The units' keys, each stored once: their bytes back to back in one
/// buffer, and a hash table of unit numbers that hashes and compares the
/// bytes they point at. A `HashMap<String, usize>` would cost an allocation
/// and a 32-byte entry per unit; this costs the key's bytes, an 8-byte
/// offset, the key's 8-byte hash and a 4-byte table slot. The hashes are
/// kept so that growing the table moves slots without hashing every key
/// again: rehashing the keys at a growth would hold intake's lock for a few
/// hundred milliseconds at a million units.
#[derive(Debug, Clone, Default)]
pub struct UnitKeys {
    /// Every key's bytes, in unit order.
    bytes: Vec<u8>,
    /// `ends[u]` is where unit u's key ends in `bytes`; it starts where unit
    /// u - 1's ends (or at 0).
    ends: Vec<u64>,
    /// `hashes[u]` is unit u's key hashed by `hasher`.
    hashes: Vec<u64>,
    /// Unit numbers, hashed by their key's bytes. Keys are unique: intake
    /// refuses a second unit with a stored key, and a rebuild refuses a
    /// store that holds one twice. This table is the only key index. Unit
    /// numbers fit in u32 (the scoring memo keeps units as u32 too).
    table: HashTable<u32>,
    /// Seeded per process, like a std `HashMap`'s: keys come from clients.
    hasher: RandomState,
}

impl UnitKeys {
    fn key<'a>(bytes: &'a [u8], ends: &[u64], unit: usize) -> &'a [u8] {
        let start = unit.checked_sub(1).map_or(0, |p| ends[p] as usize);
        &bytes[start..ends[unit] as usize]
    }

    /// Appends the key of the next unit.
    pub fn push(&mut self, key: &str) {
        debug_assert!(u32::try_from(self.ends.len()).is_ok());
        let unit = self.ends.len() as u32;
        let hash = self.hasher.hash_one(key.as_bytes());
        self.bytes.extend_from_slice(key.as_bytes());
        self.ends.push(self.bytes.len() as u64);
        self.hashes.push(hash);
        let hashes = &self.hashes;
        self.table
            .insert_unique(hash, unit, |&u| hashes[u as usize]);
    }

    /// Forgets the keys of units `units..`, newest first.
    pub fn truncate(&mut self, units: usize) {
        while self.ends.len() > units {
            let unit = self.ends.len() - 1;
            if let Ok(entry) = self
                .table
                .find_entry(self.hashes[unit], |&u| u as usize == unit)
            {
                entry.remove();
            }
            let start = unit.checked_sub(1).map_or(0, |p| self.ends[p] as usize);
            self.bytes.truncate(start);
            self.ends.pop();
            self.hashes.pop();
        }
    }

    /// The unit with this key.
    pub fn unit_of(&self, key: &str) -> Option<usize> {
        let hash = self.hasher.hash_one(key.as_bytes());
        self.table
            .find(hash, |&u| {
                Self::key(&self.bytes, &self.ends, u as usize) == key.as_bytes()
            })
            .map(|&u| u as usize)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_find_their_units_through_table_growth() {
        let mut keys = UnitKeys::default();
        let names: Vec<String> = (0..20_000).map(|i| format!("k{i}")).collect();
        for k in &names {
            keys.push(k);
        }
        for (u, k) in names.iter().enumerate() {
            assert_eq!(keys.unit_of(k), Some(u));
        }
        // Keys that are prefixes or extensions of stored ones are other keys.
        for k in ["k", "k1000x", "k00", "", "x"] {
            assert_eq!(keys.unit_of(k), None, "{k:?}");
        }
    }
}
