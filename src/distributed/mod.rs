//! Training on several processes (`train --distributed`, under MPI).
//!
//! The epoch loop in `train.rs` is written against [`Collective`], the few
//! collective operations it needs; a run on one machine uses [`Solo`], whose
//! operations change nothing, and an MPI job uses the one that `mpi::serve`
//! hands out (with the cargo feature `mpi`). Each process (a *rank*) trains replicas of the models on its
//! own share of the training shards ([`share`]); at fixed points all replicas of
//! all ranks are replaced by their mean ([`mix_across`]), which is iterative
//! parameter mixing (McDonald, Hall, Mann 2010; Zinkevich, Weimer, Smola, Li
//! 2010) over processes instead of cores.
//!
//! Every rank takes part in every collective operation in the same order, so
//! the ranks run in lockstep: the epoch is cut into stretches of the same
//! number of rounds on every rank (a rank whose share is used up holds, as a
//! replica does), and after each stretch a small exchange ([`Control`]) tells
//! every rank how many rounds the next stretch has and whether any rank was
//! asked to stop.

#[cfg(feature = "mpi")]
pub mod mpi;

use crate::error::{Error, Result};
use crate::solver::{Linear, Trainer};

/// The collective operations of a group of processes that train one model.
/// Every process must call the same operations in the same order, from one
/// thread at a time.
pub trait Collective: Sync {
    /// This process's number, from 0.
    fn rank(&self) -> usize;
    /// Processes in the group.
    fn size(&self) -> usize;
    /// Replace `buf` by its element-wise sum over all processes (every process
    /// gets the same sums).
    fn sum_f64(&self, buf: &mut [f64]);
    /// Replace `buf` by its element-wise maximum over all processes.
    fn max_u64(&self, buf: &mut [u64]);
    /// Every process's `mine` (all of the same length), in rank order.
    fn gather_u64(&self, mine: &[u64]) -> Vec<u64>;
    /// Rank 0's `buf` to every process (the others' contents are replaced).
    fn broadcast(&self, buf: &mut Vec<u8>);
    /// Bytes this process has sent in collective operations so far.
    fn bytes_sent(&self) -> u64;
}

/// The group of one process: every operation leaves its data as it is.
#[derive(Debug, Default, Clone, Copy)]
pub struct Solo;

impl Collective for Solo {
    fn rank(&self) -> usize {
        0
    }
    fn size(&self) -> usize {
        1
    }
    fn sum_f64(&self, _: &mut [f64]) {}
    fn max_u64(&self, _: &mut [u64]) {}
    fn gather_u64(&self, mine: &[u64]) -> Vec<u64> {
        mine.to_vec()
    }
    fn broadcast(&self, _: &mut Vec<u8>) {}
    fn bytes_sent(&self) -> u64 {
        0
    }
}

/// Raised on every rank that did not fail itself when another rank failed: the
/// failing rank prints its own error, the others only stop.
pub const PEER_FAILED: &str = "another rank of the job failed";

/// Make every rank agree on the outcome of a step that each did on its own: if
/// any rank failed, all return an error, and one message tells what happened:
/// a failure of every rank is returned as it is (rank 0 prints it), one of
/// some ranks is returned by the lowest of them naming itself (`rank R: ...`),
/// and the others return [`PEER_FAILED`] (printed by nobody). With one
/// process, `local` as it is.
pub fn agree<T>(comm: &dyn Collective, local: Result<T>) -> Result<T> {
    if comm.size() == 1 {
        return local;
    }
    let flags = comm.gather_u64(&[local.is_err() as u64]);
    let failed: Vec<usize> = (0..flags.len()).filter(|&r| flags[r] != 0).collect();
    match local {
        ok @ Ok(_) if failed.is_empty() => ok,
        Err(e) if failed.len() == comm.size() => Err(e),
        Err(e) if failed[0] == comm.rank() => {
            Err(Error::Invalid(format!("rank {}: {e}", comm.rank())))
        }
        _ => Err(Error::Invalid(PEER_FAILED.into())),
    }
}

/// Gather `value` from every rank; if any differs from rank 0's, the error
/// `message(rank 0's value, "rank R has X, ...")` on every rank.
fn require_same(
    comm: &dyn Collective,
    value: u64,
    message: impl FnOnce(u64, String) -> String,
) -> Result<()> {
    if comm.size() == 1 {
        return Ok(());
    }
    let all = comm.gather_u64(&[value]);
    let differ: Vec<String> = all
        .iter()
        .enumerate()
        .filter(|&(_, &v)| v != all[0])
        .map(|(r, v)| format!("rank {r} has {v:016x}"))
        .collect();
    if differ.is_empty() {
        return Ok(());
    }
    Err(Error::Invalid(message(all[0], differ.join(", "))))
}

/// Check that every rank opened the same dataset (the manifest's
/// `fingerprint`); the message names the ranks that differ.
pub fn check_same_dataset(comm: &dyn Collective, fingerprint: u64) -> Result<()> {
    require_same(comm, fingerprint, |first, differ| {
        format!(
            "the ranks do not see the same dataset: rank 0 has fingerprint {first:016x}, \
             {differ}; every rank must open the same dataset (one shared folder, or identical \
             copies of it)"
        )
    })
}

/// Check that every rank was started with the same training settings (a hash
/// of them); the message names the ranks that differ.
pub fn check_same_settings(comm: &dyn Collective, settings: u64) -> Result<()> {
    require_same(comm, settings, |first, differ| {
        format!(
            "the ranks were started with different training settings (rank 0 has \
             {first:016x}, {differ}): start every rank with the same options"
        )
    })
}

/// The training shards (indices into `lens`) of `rank` among `ranks` in
/// `epoch`, in increasing order. The shards are dealt in a seeded random order
/// that changes with the epoch, each to the rank with the fewest rows so far
/// (the lowest rank on a tie), so the ranks' shares differ by at most one
/// shard's rows and every rank sees other data each epoch. One rank gets all.
pub fn share(lens: &[usize], seed: u64, epoch: u32, rank: usize, ranks: usize) -> Vec<usize> {
    if ranks <= 1 {
        return (0..lens.len()).collect();
    }
    use rand::seq::SliceRandom;
    use rand::SeedableRng;
    let mut order: Vec<usize> = (0..lens.len()).collect();
    let key = xxhash_rust::xxh3::xxh3_64_with_seed(
        &[0x7261_6e6b_u64, epoch as u64, ranks as u64]
            .iter()
            .flat_map(|x| x.to_le_bytes())
            .collect::<Vec<u8>>(),
        seed,
    );
    order.shuffle(&mut rand_chacha::ChaCha8Rng::seed_from_u64(key));
    let mut load = vec![0usize; ranks];
    let mut mine = Vec::new();
    for i in order {
        let r = (0..ranks).min_by_key(|&r| (load[r], r)).expect("ranks > 1");
        load[r] += lens[i];
        if r == rank {
            mine.push(i);
        }
    }
    mine.sort_unstable();
    mine
}

/// Elements of a model's arrays summed per collective call: bounds the
/// scratch memory of a mix (1 MiB).
const PIECE: usize = 1 << 17;

/// Sum `data` over all ranks in place, a piece at a time (the MPI group copies
/// each piece into a buffer of its own).
fn sum_in_pieces(comm: &dyn Collective, data: &mut [f64]) {
    for piece in data.chunks_mut(PIECE) {
        comm.sum_f64(piece);
    }
}

/// Replace every replica of every rank by the mean of all of them: first the
/// mean of this rank's replicas ([`crate::solver::mix::mix`]), then the mean
/// over ranks. With one rank, only the first (so a one-rank job takes exactly
/// the steps of a run on one machine). Every rank ends with the same bits: the
/// sums over ranks are the collective's, which every rank receives alike.
pub fn mix_across(replicas: &mut [Trainer], comm: &dyn Collective) {
    crate::solver::mix::mix(replicas);
    let p = comm.size();
    if p == 1 {
        return;
    }
    let (first, rest) = replicas.split_first_mut().expect("at least one replica");
    for (k, m) in first.models.iter_mut().enumerate() {
        mix_model_across(m, comm, p);
        for r in rest.iter_mut() {
            r.models[k].assign(m);
        }
    }
}

/// The mean of one model over all ranks, written into `m`.
fn mix_model_across(m: &mut Linear, comm: &dyn Collective, p: usize) {
    let (v, u, mut scalars) = m.fold_scale();
    sum_in_pieces(comm, v);
    sum_in_pieces(comm, u);
    let ranks = p as f64;
    for x in v.iter_mut() {
        *x /= ranks;
    }
    for x in u.iter_mut() {
        *x /= ranks;
    }
    let vnorm2 = v.iter().map(|x| x * x).sum::<f64>();
    // b and Σb are averaged; s = 1, B = 0 after the fold.
    let mut bs = [scalars[1], scalars[4]];
    comm.sum_f64(&mut bs);
    scalars[1] = bs[0] / ranks;
    scalars[4] = bs[1] / ranks;
    scalars[2] = vnorm2;
    m.set_scalars(scalars);
}

/// What every rank tells the others after a stretch.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Control {
    /// Rounds of the next stretch (the most any rank has; 0: the epoch is over).
    pub rounds: u64,
    /// Some rank was asked to stop.
    pub stop: bool,
    /// Rank 0's clock says a checkpoint is due.
    pub checkpoint_due: bool,
}

/// Exchange this rank's [`Control`] with the others: the result is the most
/// rounds, and whether any rank asked to stop or found a checkpoint due.
pub fn exchange(comm: &dyn Collective, mine: Control) -> Control {
    let mut buf = [mine.rounds, mine.stop as u64, mine.checkpoint_due as u64];
    comm.max_u64(&mut buf);
    Control {
        rounds: buf[0],
        stop: buf[1] != 0,
        checkpoint_due: buf[2] != 0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shares_cover_every_shard_once_and_balance_rows() {
        let lens: Vec<usize> = (0..37).map(|i| 1000 + (i * 7919) % 500).collect();
        for ranks in [1usize, 2, 3, 5] {
            for epoch in 0..3 {
                let shares: Vec<Vec<usize>> = (0..ranks)
                    .map(|r| share(&lens, 9, epoch, r, ranks))
                    .collect();
                let mut all: Vec<usize> = shares.concat();
                all.sort_unstable();
                assert_eq!(all, (0..lens.len()).collect::<Vec<_>>());
                let rows: Vec<usize> = shares
                    .iter()
                    .map(|s| s.iter().map(|&i| lens[i]).sum())
                    .collect();
                let (lo, hi) = (rows.iter().min().unwrap(), rows.iter().max().unwrap());
                // Greedy dealing: shares differ by at most the largest shard.
                assert!(hi - lo <= *lens.iter().max().unwrap(), "{rows:?}");
            }
        }
        // The shares change with the epoch.
        assert_ne!(share(&lens, 9, 0, 0, 2), share(&lens, 9, 1, 0, 2));
        assert_eq!(share(&lens, 9, 4, 1, 3), share(&lens, 9, 4, 1, 3));
    }

    #[test]
    fn one_process_changes_nothing() {
        let s = Solo;
        let mut x = [1.5, -2.0];
        s.sum_f64(&mut x);
        assert_eq!(x, [1.5, -2.0]);
        assert_eq!(s.gather_u64(&[3, 4]), vec![3, 4]);
        let c = Control {
            rounds: 7,
            stop: true,
            checkpoint_due: false,
        };
        assert_eq!(exchange(&s, c), c);
        assert!(agree(&s, Ok(1)).is_ok());
        assert!(check_same_dataset(&s, 5).is_ok());
        assert!(check_same_settings(&s, 6).is_ok());
    }
}
