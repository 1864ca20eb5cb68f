//! [`Collective`] over MPI (the `mpi` crate on the system's OpenMPI or MPICH),
//! with the cargo feature `mpi`.
//!
//! MPI is started with `MPI_THREAD_FUNNELED`: only the thread that started it
//! calls it. Training runs on a thread pool, so [`serve`] runs the work on a
//! thread of its own and hands it a [`Collective`] that forwards each operation
//! to the starting thread over a channel; that thread makes the MPI call and
//! sends the result back. The sums of a mix move 1 MiB at a time (see
//! [`super::PIECE`]), so the copies cost little next to the network; a
//! broadcast (a checkpoint, on resume) goes in pieces of [`BROADCAST_PIECE`],
//! below MPI's count limit of 2^31 − 1 elements.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{channel, Receiver, Sender};
use std::sync::Mutex;

use mpi::collective::SystemOperation;
use mpi::topology::SimpleCommunicator;
use mpi::traits::*;

use super::Collective;

/// Bytes per call of a broadcast.
pub const BROADCAST_PIECE: usize = 64 << 20;

/// The processes of an MPI job (`MPI_COMM_WORLD`), used from the thread that
/// started MPI.
pub struct World {
    world: SimpleCommunicator,
}

/// Start MPI for this process: the universe (MPI ends when it is dropped) and
/// the job's processes. `None` when MPI was started already.
pub fn start() -> Option<(mpi::environment::Universe, World)> {
    let (universe, _threading) = mpi::initialize_with_threading(mpi::Threading::Funneled)?;
    let world = universe.world();
    Some((universe, World { world }))
}

impl World {
    /// This process's rank.
    pub fn rank(&self) -> usize {
        self.world.rank() as usize
    }

    /// Processes in the job.
    pub fn size(&self) -> usize {
        self.world.size() as usize
    }

    fn answer(&self, request: Request) -> Reply {
        match request {
            Request::Sum(mine) => {
                let mut all = vec![0.0; mine.len()];
                self.world
                    .all_reduce_into(&mine[..], &mut all[..], SystemOperation::sum());
                Reply::F64(all)
            }
            Request::Max(mine) => {
                let mut all = vec![0; mine.len()];
                self.world
                    .all_reduce_into(&mine[..], &mut all[..], SystemOperation::max());
                Reply::U64(all)
            }
            Request::Gather(mine) => {
                let mut all = vec![0u64; mine.len() * self.size()];
                self.world.all_gather_into(&mine[..], &mut all[..]);
                Reply::U64(all)
            }
            Request::Broadcast(mut buf) => {
                let root = self.world.process_at_rank(0);
                let mut len = [buf.len() as u64];
                root.broadcast_into(&mut len[..]);
                buf.resize(len[0] as usize, 0);
                for piece in buf.chunks_mut(BROADCAST_PIECE) {
                    root.broadcast_into(piece);
                }
                Reply::Bytes(buf)
            }
        }
    }
}

enum Request {
    Sum(Vec<f64>),
    Max(Vec<u64>),
    Gather(Vec<u64>),
    Broadcast(Vec<u8>),
}

enum Reply {
    F64(Vec<f64>),
    U64(Vec<u64>),
    Bytes(Vec<u8>),
}

/// The [`Collective`] that [`serve`] hands to the work.
struct Proxy {
    rank: usize,
    size: usize,
    channel: Mutex<(Sender<Request>, Receiver<Reply>)>,
    sent: AtomicU64,
}

impl Proxy {
    fn call(&self, request: Request, bytes: usize) -> Reply {
        self.sent.fetch_add(bytes as u64, Ordering::Relaxed);
        let chan = self.channel.lock().unwrap_or_else(|e| e.into_inner());
        // The serving thread outlives the work (see `serve`), so neither end
        // is closed while the work runs.
        chan.0
            .send(request)
            .expect("the MPI thread serves until the work ends");
        chan.1.recv().expect("the MPI thread answers every request")
    }
}

impl Collective for Proxy {
    fn rank(&self) -> usize {
        self.rank
    }

    fn size(&self) -> usize {
        self.size
    }

    fn sum_f64(&self, buf: &mut [f64]) {
        if let Reply::F64(all) = self.call(Request::Sum(buf.to_vec()), buf.len() * 8) {
            buf.copy_from_slice(&all);
        }
    }

    fn max_u64(&self, buf: &mut [u64]) {
        if let Reply::U64(all) = self.call(Request::Max(buf.to_vec()), buf.len() * 8) {
            buf.copy_from_slice(&all);
        }
    }

    fn gather_u64(&self, mine: &[u64]) -> Vec<u64> {
        match self.call(Request::Gather(mine.to_vec()), mine.len() * 8) {
            Reply::U64(all) => all,
            _ => unreachable!("a gather is answered with numbers"),
        }
    }

    fn broadcast(&self, buf: &mut Vec<u8>) {
        let bytes = if self.rank == 0 { buf.len() + 8 } else { 0 };
        if let Reply::Bytes(all) = self.call(Request::Broadcast(std::mem::take(buf)), bytes) {
            *buf = all;
        }
    }

    fn bytes_sent(&self) -> u64 {
        self.sent.load(Ordering::Relaxed)
    }
}

/// Run `work` on a thread of its own with a [`Collective`] over `world`, while
/// this thread (the one that started MPI) makes the MPI calls it asks for.
/// Returns what `work` returns (a panic in it, or in an MPI call, is raised
/// again here: a panic here first closes the channels, so the work does not
/// wait for an answer that never comes).
pub fn serve<R: Send>(world: &World, work: impl FnOnce(&dyn Collective) -> R + Send) -> R {
    let (req_tx, req_rx) = channel::<Request>();
    let (rep_tx, rep_rx) = channel::<Reply>();
    let (rank, size) = (world.rank(), world.size());
    std::thread::scope(|scope| {
        let worker = std::thread::Builder::new()
            .name("tamis-run".into())
            .spawn_scoped(scope, move || {
                let proxy = Proxy {
                    rank,
                    size,
                    channel: Mutex::new((req_tx, rep_rx)),
                    sent: AtomicU64::new(0),
                };
                work(&proxy)
                // The proxy is dropped here: the requests' channel closes and
                // the loop below ends.
            })
            .expect("cannot start the training thread");
        // The channel ends move into the serving closure, so a panic drops
        // them and the worker's wait ends.
        let served = std::panic::catch_unwind(std::panic::AssertUnwindSafe(move || {
            while let Ok(request) = req_rx.recv() {
                if rep_tx.send(world.answer(request)).is_err() {
                    break;
                }
            }
        }));
        let worked = worker.join();
        if let Err(panic) = served {
            std::panic::resume_unwind(panic);
        }
        worked.unwrap_or_else(|panic| std::panic::resume_unwind(panic))
    })
}
