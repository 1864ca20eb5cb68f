//! The order in which an epoch visits rows.
//!
//! Shards are visited in a seeded random order, in groups of up to
//! [`GROUP_SHARDS`] shards. Inside a group, each shard's rows follow a seeded
//! random permutation and the next row is drawn from a shard chosen at random
//! with probability proportional to its remaining rows, so the rows of the group
//! are interleaved. With the scatter of `ingest`, this gives a near-random order
//! even for input sorted by time or label, while only a group's permutations are
//! held in memory (4 bytes per row of the group's shards).
//!
//! Everything is drawn from ChaCha8 generators seeded from `(seed, epoch)` and
//! `(seed, epoch, group)`, so a position inside an epoch can be recreated from
//! `(epoch, group, rows taken)`.

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use xxhash_rust::xxh3::xxh3_64_with_seed;

use super::Rows;
use crate::shard::Row;

/// Shards whose rows are interleaved at once.
pub const GROUP_SHARDS: usize = 8;
/// Bits of a row id that hold the row number inside its shard.
pub const ROW_BITS: u32 = 40;

fn seed_of(seed: u64, parts: &[u64]) -> u64 {
    let bytes: Vec<u8> = parts.iter().flat_map(|p| p.to_le_bytes()).collect();
    xxh3_64_with_seed(&bytes, seed)
}

/// The shard order of `epoch`, cut into groups.
pub fn groups(n_shards: usize, seed: u64, epoch: u32) -> Vec<Vec<usize>> {
    let mut order: Vec<usize> = (0..n_shards).collect();
    let mut rng = ChaCha8Rng::seed_from_u64(seed_of(seed, &[0x5eed, epoch as u64]));
    order.shuffle(&mut rng);
    order.chunks(GROUP_SHARDS).map(|c| c.to_vec()).collect()
}

/// Rows of several parts seen as one: row id `slot << ROW_BITS | row`.
pub struct Group<'a, R> {
    parts: Vec<&'a R>,
}

impl<'a, R: Rows> Group<'a, R> {
    /// A view over `parts`.
    pub fn new(parts: Vec<&'a R>) -> Self {
        Group { parts }
    }
}

impl<R: Rows> Rows for Group<'_, R> {
    fn len(&self) -> usize {
        self.parts.iter().map(|p| p.len()).sum()
    }
    #[inline]
    fn row(&self, i: usize) -> Row<'_> {
        self.parts[i >> ROW_BITS].row(i & ((1usize << ROW_BITS) - 1))
    }
    #[inline]
    fn prefetch(&self, i: usize) {
        if let Some(p) = self.parts.get(i >> ROW_BITS) {
            p.prefetch(i & ((1usize << ROW_BITS) - 1));
        }
    }
}

/// Draws the rows of one group in interleaved random order.
pub struct Interleave {
    perms: Vec<Vec<u32>>,
    pos: Vec<usize>,
    remaining: usize,
    taken: u64,
    rng: ChaCha8Rng,
}

impl Interleave {
    /// The order for a group whose shards have `lens` rows.
    pub fn new(lens: &[usize], seed: u64, epoch: u32, group: usize) -> Self {
        let perms: Vec<Vec<u32>> = lens
            .iter()
            .enumerate()
            .map(|(slot, &n)| {
                let mut p: Vec<u32> = (0..n as u32).collect();
                let mut r = ChaCha8Rng::seed_from_u64(seed_of(
                    seed,
                    &[0x9e2a, epoch as u64, group as u64, slot as u64],
                ));
                p.shuffle(&mut r);
                p
            })
            .collect();
        Interleave {
            remaining: lens.iter().sum(),
            pos: vec![0; lens.len()],
            perms,
            taken: 0,
            rng: ChaCha8Rng::seed_from_u64(seed_of(seed, &[0x1eaf, epoch as u64, group as u64])),
        }
    }

    /// Rows not drawn yet.
    pub fn remaining(&self) -> usize {
        self.remaining
    }

    /// Rows drawn so far.
    pub fn taken(&self) -> u64 {
        self.taken
    }

    /// Draw up to `n` row ids into `out` (cleared first).
    pub fn next_batch(&mut self, n: usize, out: &mut Vec<usize>) {
        out.clear();
        while out.len() < n && self.remaining > 0 {
            let mut pick = self.rng.random_range(0..self.remaining);
            let mut slot = 0;
            loop {
                let left = self.perms[slot].len() - self.pos[slot];
                if pick < left {
                    break;
                }
                pick -= left;
                slot += 1;
            }
            let row = self.perms[slot][self.pos[slot]] as usize;
            self.pos[slot] += 1;
            self.remaining -= 1;
            self.taken += 1;
            out.push((slot << ROW_BITS) | row);
        }
    }

    /// Skip `n` rows (to resume inside a group).
    pub fn skip(&mut self, n: u64) {
        let mut scratch = Vec::new();
        let mut left = n;
        while left > 0 && self.remaining > 0 {
            let take = left.min(4096) as usize;
            self.next_batch(take, &mut scratch);
            left -= take as u64;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_row_once_and_deterministic() {
        let lens = [5, 0, 17, 3];
        let mut a = Interleave::new(&lens, 1, 2, 3);
        let mut all = Vec::new();
        let mut b = Vec::new();
        while a.remaining() > 0 {
            a.next_batch(4, &mut b);
            all.extend_from_slice(&b);
        }
        let mut sorted = all.clone();
        sorted.sort();
        let mut want: Vec<usize> = Vec::new();
        for (slot, &n) in lens.iter().enumerate() {
            want.extend((0..n).map(|r| (slot << ROW_BITS) | r));
        }
        want.sort();
        assert_eq!(sorted, want);
        let mut c = Interleave::new(&lens, 1, 2, 3);
        let mut again = Vec::new();
        c.next_batch(100, &mut again);
        assert_eq!(again, all);
        // Resuming after a skip gives the same tail.
        let mut d = Interleave::new(&lens, 1, 2, 3);
        d.skip(7);
        d.next_batch(100, &mut again);
        assert_eq!(again, all[7..]);
        // Another epoch, another order.
        let mut e = Interleave::new(&lens, 1, 3, 3);
        e.next_batch(100, &mut again);
        assert_ne!(again, all);
    }

    #[test]
    fn groups_cover_shards() {
        let g = groups(19, 4, 0);
        assert_eq!(g.len(), 3);
        let mut all: Vec<usize> = g.concat();
        all.sort();
        assert_eq!(all, (0..19).collect::<Vec<_>>());
        assert_ne!(groups(19, 4, 1), g);
    }
}
