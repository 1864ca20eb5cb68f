//! The order in which an epoch visits rows.
//!
//! Shards are visited in a seeded random order, in groups of up to
//! [`GROUP_SHARDS`] shards. A group's shards are cut into blocks of
//! [`BLOCK_ROWS`] consecutive rows, the blocks are shuffled and taken
//! [`WINDOW_BLOCKS`] at a time into a window, and a window's rows are drawn by
//! [`LANES`] lanes reading shuffled runs of [`RUN_ROWS`] consecutive rows (see
//! [`Interleave`]). With the scatter of `ingest`, this gives a near-random order
//! even for input sorted by time or label, while memory holds one entry per
//! block of the group and a few words per row of the current window.
//!
//! Everything is drawn from ChaCha8 generators seeded from `(seed, epoch)`,
//! `(seed, epoch, group)` and `(seed, epoch, group, window)`, so a position
//! inside an epoch can be recreated from `(epoch, group, rows taken)`. A
//! checkpoint records [`ORDER_VERSION`]: a position means nothing under
//! another version of these rules.

use rand::seq::SliceRandom;
use rand::SeedableRng;
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

/// Rows of a shard that an epoch reads together: consecutive rows, so that
/// they come off the disk or the page cache in one sequential piece.
pub const BLOCK_ROWS: usize = 512;
/// Blocks whose rows are mixed at once: a window of the epoch's order holds the
/// rows of this many blocks, drawn at random from all the shards of the group.
pub const WINDOW_BLOCKS: usize = 128;
/// Version of the rules above, stored in checkpoints: 1 is the lanes inside a
/// window; checkpoints without it were written under a uniform permutation of
/// each window.
pub const ORDER_VERSION: u32 = 1;

/// Consecutive rows of a block that one lane of a window reads in turn: about
/// 3 KiB of a shard for short messages, so the rows share cache lines and pages.
pub const RUN_ROWS: usize = 16;
/// Lanes of a window: each reads one run at a time, and the window's order takes
/// one row from each lane in turn, so while every lane has a run (all but the
/// last few runs of a window, and a window of at least this many runs), any
/// [`LANES`] consecutive rows come from that many places of the window.
pub const LANES: usize = 64;

/// Draws the rows of one group in a random order that stays local.
///
/// The group's shards are cut into blocks of [`BLOCK_ROWS`] consecutive rows;
/// the blocks are shuffled, and taken [`WINDOW_BLOCKS`] at a time into a
/// window. A window's blocks are cut into runs of [`RUN_ROWS`] consecutive
/// rows, the runs are shuffled, and [`LANES`] lanes read them: each lane takes
/// the next run of the shuffled list when its own is done, and the order takes
/// one row from each lane in turn. So a batch of 64 rows comes from 64 random
/// places of the window (except near a window's end, where lanes run dry),
/// while the rows that follow in each lane sit next to
/// the one just read: they share its cache lines and pages, and a lane's data
/// stays in the caches while the window moves on. A window touches a bounded
/// part of the data (about 13 MB for short messages); a fully random order over
/// gigabytes would miss the caches and address translation on every row.
/// Because the blocks of a window come from random places of several shards
/// (and `ingest` scatters the input over its shards), a window mixes the whole
/// input even when it arrived sorted by time or label.
pub struct Interleave {
    /// Every block of the group: `(slot, first row, rows)`, in the drawn order.
    blocks: Vec<(u32, u64, u32)>,
    /// The next block to go into a window.
    next_block: usize,
    /// The current window's rows (as row ids), in drawn order.
    window: Vec<usize>,
    /// Scratch of [`Interleave::next_window`]: the window's rows in block
    /// order, and its runs as ranges of them.
    rows: Vec<usize>,
    runs: Vec<(u32, u32)>,
    /// Position in `window`.
    pos: usize,
    /// Windows started so far.
    windows: u64,
    remaining: usize,
    taken: u64,
    seed: u64,
    epoch: u32,
    group: usize,
}

impl Interleave {
    /// The order for a group whose shards have `lens` rows.
    pub fn new(lens: &[usize], seed: u64, epoch: u32, group: usize) -> Self {
        let mut blocks = Vec::new();
        for (slot, &n) in lens.iter().enumerate() {
            for start in (0..n).step_by(BLOCK_ROWS) {
                blocks.push((
                    slot as u32,
                    start as u64,
                    (n - start).min(BLOCK_ROWS) as u32,
                ));
            }
        }
        let mut rng =
            ChaCha8Rng::seed_from_u64(seed_of(seed, &[0xb10c, epoch as u64, group as u64]));
        blocks.shuffle(&mut rng);
        Interleave {
            blocks,
            next_block: 0,
            window: Vec::new(),
            rows: Vec::new(),
            runs: Vec::new(),
            pos: 0,
            windows: 0,
            remaining: lens.iter().sum(),
            taken: 0,
            seed,
            epoch,
            group,
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

    /// Fill the next window from the next blocks and draw its order.
    fn next_window(&mut self) {
        let end = (self.next_block + WINDOW_BLOCKS).min(self.blocks.len());
        self.rows.clear();
        self.runs.clear();
        for &(slot, start, n) in &self.blocks[self.next_block..end] {
            let base = (slot as usize) << ROW_BITS;
            let first = self.rows.len();
            self.rows
                .extend((start as usize..start as usize + n as usize).map(|r| base | r));
            // Runs never cross a block's end: a block's rows are consecutive.
            for a in (first..self.rows.len()).step_by(RUN_ROWS) {
                self.runs
                    .push((a as u32, (a + RUN_ROWS).min(self.rows.len()) as u32));
            }
        }
        self.next_block = end;
        let mut rng = ChaCha8Rng::seed_from_u64(seed_of(
            self.seed,
            &[0x9e2a, self.epoch as u64, self.group as u64, self.windows],
        ));
        self.runs.shuffle(&mut rng);
        // Lanes take runs in the shuffled order as theirs run out; the order
        // takes a row from each lane with rows left, lane by lane.
        let mut lanes = [(0u32, 0u32); LANES];
        let mut next = 0;
        self.window.clear();
        loop {
            let before = self.window.len();
            for lane in lanes.iter_mut() {
                if lane.0 == lane.1 {
                    match self.runs.get(next) {
                        Some(&run) => *lane = run,
                        None => continue,
                    }
                    next += 1;
                }
                self.window.push(self.rows[lane.0 as usize]);
                lane.0 += 1;
            }
            if self.window.len() == before {
                break;
            }
        }
        self.windows += 1;
        self.pos = 0;
    }

    /// Draw up to `n` row ids into `out` (cleared first).
    pub fn next_batch(&mut self, n: usize, out: &mut Vec<usize>) {
        out.clear();
        while out.len() < n && self.remaining > 0 {
            if self.pos == self.window.len() {
                self.next_window();
            }
            let take = (n - out.len()).min(self.window.len() - self.pos);
            out.extend_from_slice(&self.window[self.pos..self.pos + take]);
            self.pos += take;
            self.remaining -= take;
            self.taken += take as u64;
        }
    }

    /// Skip `n` rows (to resume inside a group).
    pub fn skip(&mut self, n: u64) {
        let mut left = n;
        while left > 0 && self.remaining > 0 {
            if self.pos == self.window.len() {
                self.next_window();
            }
            let take = (left.min((self.window.len() - self.pos) as u64)) as usize;
            self.pos += take;
            self.remaining -= take;
            self.taken += take as u64;
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

    /// Windows stay local: the rows drawn between two window starts come from
    /// at most `WINDOW_BLOCKS` blocks; and big shards are visited in several
    /// windows, with every row once.
    #[test]
    fn windows_are_local_and_complete() {
        let lens = [3000, 7000, 0, 2500];
        let mut a = Interleave::new(&lens, 9, 0, 1);
        let total: usize = lens.iter().sum();
        let window_rows = WINDOW_BLOCKS * BLOCK_ROWS;
        let mut all = Vec::new();
        let mut b = Vec::new();
        while a.remaining() > 0 {
            a.next_batch(64, &mut b);
            all.extend_from_slice(&b);
        }
        assert_eq!(all.len(), total);
        let mut sorted = all.clone();
        sorted.sort();
        sorted.dedup();
        assert_eq!(sorted.len(), total);
        for chunk in all.chunks(window_rows) {
            let mut blocks: Vec<(usize, usize)> = chunk
                .iter()
                .map(|&id| (id >> ROW_BITS, (id & ((1 << ROW_BITS) - 1)) / BLOCK_ROWS))
                .collect();
            blocks.sort();
            blocks.dedup();
            assert!(blocks.len() <= WINDOW_BLOCKS, "{} blocks", blocks.len());
        }
    }

    /// Lanes: while every lane has a run, any [`LANES`] rows drawn in a row
    /// (one pass over the lanes) come from as many different runs, and a lane's
    /// next row is the shard's next row except where it starts a new run.
    #[test]
    fn lanes_draw_from_many_places_and_read_on_in_each() {
        let lens = [BLOCK_ROWS * WINDOW_BLOCKS + 300];
        let mut a = Interleave::new(&lens, 5, 0, 0);
        let mut w = Vec::new();
        a.next_batch(BLOCK_ROWS * WINDOW_BLOCKS, &mut w);
        let run_of = |id: usize| (id & ((1 << ROW_BITS) - 1)) / RUN_ROWS;
        // All lanes hold a run until the shuffled list is used up, which is
        // at the latest LANES runs before the window's end.
        let full = w.len() - LANES * RUN_ROWS;
        for pass in w[..full].chunks(LANES) {
            let mut runs: Vec<usize> = pass.iter().map(|&id| run_of(id)).collect();
            runs.sort();
            runs.dedup();
            assert_eq!(runs.len(), LANES);
        }
        let next_in_shard = (0..full - LANES)
            .filter(|&p| w[p + LANES] == w[p] + 1)
            .count();
        let expected = (full - LANES) * (RUN_ROWS - 1) / RUN_ROWS;
        assert!(
            next_in_shard + LANES >= expected,
            "{next_in_shard} of {} steps of a lane read on, expected about {expected}",
            full - LANES
        );
    }

    /// Input sorted by label still reaches the solver mixed: with two labels
    /// in two sorted halves of each shard, every stretch of 2,048 drawn rows
    /// holds both labels in a proportion near the overall one (a window mixes
    /// blocks from random places of all shards).
    #[test]
    fn sorted_input_is_mixed() {
        let lens = [40_000usize, 40_000, 40_000];
        let label = |id: usize| ((id & ((1 << ROW_BITS) - 1)) >= 20_000) as u32;
        let mut a = Interleave::new(&lens, 3, 0, 0);
        let mut b = Vec::new();
        let mut worst = 0.0f64;
        while a.remaining() > 0 {
            a.next_batch(2048, &mut b);
            if b.len() < 2048 {
                break;
            }
            let ones = b.iter().filter(|&&id| label(id) == 1).count() as f64 / b.len() as f64;
            worst = worst.max((ones - 0.5).abs());
        }
        // A window holds 128 blocks of 512 rows (the last one fewer); the
        // share of one label among its blocks is about binomial(128, 1/2)/128,
        // standard deviation 0.044: a deviation of 0.2 is over 4 of them.
        assert!(worst < 0.2, "a stretch is {worst} away from an even mix");
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
