//! The ordered pipeline shared by ingest and scoring: a reader thread cuts the
//! inputs into chunks, `threads` worker threads turn each chunk into an output,
//! and the calling thread takes the outputs in input order.
//!
//! Workers pull chunks as they become free (no batch barrier) and keep their
//! state (featurizer, counters, buffers) for the whole run. Outputs come from a
//! fixed pool: a worker takes one before it takes a chunk and the calling thread
//! hands it back once consumed, so at most [`Pipeline::outputs`] results wait
//! to be put in order, whatever a slow worker does, and their buffers are
//! reused rather than allocated anew for every chunk. Chunk buffers go back to
//! the reader the same way.

use std::collections::BTreeMap;
use std::sync::atomic::AtomicU64;
use std::sync::mpsc::{channel, sync_channel};
use std::sync::{Arc, Mutex};

use super::{read_inputs_recycling, Chunk, Fingerprint, InputSpec, LabelMode, ReadMsg};
use crate::error::{Error, Result};

/// What the calling thread receives, in input order.
pub enum Step<'a, O> {
    /// The output of the next chunk.
    Chunk(&'a mut O),
    /// Input number `.0` has been read whole; its fingerprint.
    Done(usize, Fingerprint),
}

/// Settings of a pipeline run.
pub struct Pipeline<'a> {
    /// Input paths (`-` for standard input), read in order.
    pub inputs: &'a [String],
    /// How records are read.
    pub spec: &'a InputSpec,
    /// Whether records need labels.
    pub mode: LabelMode,
    /// Raw bytes read so far, updated by the reader.
    pub progress: Arc<AtomicU64>,
    /// Outputs in the pool (at least the number of workers; more lets workers
    /// run ahead of a slow consumer).
    pub outputs: usize,
}

enum Done<O> {
    Out(O, Vec<u8>),
    Msg(ReadMsg),
}

impl Pipeline<'_> {
    /// Run the pipeline with one worker per element of `workers` (each owned by
    /// its thread for the whole run and handed back at the end). `work` fills a
    /// (reused) output from a chunk; `consume` takes the outputs, and the end of
    /// each input, in input order on the calling thread. The first error of the
    /// reader or of `consume` stops the run and is returned.
    pub fn run<W, O>(
        &self,
        workers: Vec<W>,
        new_output: impl Fn() -> O,
        work: impl Fn(&mut W, &Chunk, &mut O) + Sync,
        mut consume: impl FnMut(Step<'_, O>) -> Result<()>,
    ) -> Result<Vec<W>>
    where
        W: Send,
        O: Send,
    {
        let threads = workers.len().max(1);
        let (read_tx, read_rx) = sync_channel::<ReadMsg>(threads + 1);
        let (spare_tx, spare_rx) = channel::<Vec<u8>>();
        let (done_tx, done_rx) = channel::<(u64, Done<O>)>();
        let (pool_tx, pool_rx) = channel::<O>();
        for _ in 0..self.outputs.max(threads) {
            pool_tx.send(new_output()).expect("receiver alive");
        }
        // The reader's messages are numbered as workers take them, under the
        // same lock, so the numbers follow the input order.
        let jobs = Mutex::new((read_rx, 0u64));
        let pool = Mutex::new(pool_rx);
        let work = &work;
        std::thread::scope(|s| -> Result<Vec<W>> {
            let (inputs, spec, mode) = (self.inputs, self.spec, self.mode);
            let progress = self.progress.clone();
            std::thread::Builder::new()
                .name("tamis-read".into())
                .spawn_scoped(s, move || {
                    read_inputs_recycling(inputs, spec, mode, progress, read_tx, Some(spare_rx))
                })
                .map_err(|e| Error::Invalid(format!("cannot start a thread: {e}")))?;
            let mut handles = Vec::with_capacity(threads);
            for (i, mut w) in workers.into_iter().enumerate() {
                let (jobs, pool, done_tx, spare_tx) =
                    (&jobs, &pool, done_tx.clone(), spare_tx.clone());
                let h = std::thread::Builder::new()
                    .name(format!("tamis-work-{i}"))
                    .spawn_scoped(s, move || {
                        let mut out: Option<O> = None;
                        loop {
                            // An output first, then a chunk: a worker holding a
                            // chunk never waits for an output, so the chunk the
                            // consumer waits for is always being worked on.
                            if out.is_none() {
                                match pool.lock().expect("not poisoned").recv() {
                                    Ok(o) => out = Some(o),
                                    Err(_) => break,
                                }
                            }
                            let (seq, msg) = {
                                let mut g = jobs.lock().expect("not poisoned");
                                match g.0.recv() {
                                    Ok(m) => {
                                        g.1 += 1;
                                        (g.1 - 1, m)
                                    }
                                    Err(_) => break,
                                }
                            };
                            let done = match msg {
                                ReadMsg::Chunk(c) => {
                                    let mut o = out.take().expect("taken above");
                                    work(&mut w, &c, &mut o);
                                    Done::Out(o, c.data)
                                }
                                other => Done::Msg(other),
                            };
                            if done_tx.send((seq, done)).is_err() {
                                break;
                            }
                        }
                        drop(spare_tx);
                        w
                    })
                    .map_err(|e| Error::Invalid(format!("cannot start a thread: {e}")))?;
                handles.push(h);
            }
            drop(done_tx);
            let result = (|| -> Result<()> {
                let mut waiting: BTreeMap<u64, Done<O>> = BTreeMap::new();
                let mut next = 0u64;
                for (seq, d) in &done_rx {
                    waiting.insert(seq, d);
                    while let Some(d) = waiting.remove(&next) {
                        next += 1;
                        match d {
                            Done::Out(mut o, data) => {
                                let _ = spare_tx.send(data);
                                consume(Step::Chunk(&mut o))?;
                                let _ = pool_tx.send(o);
                            }
                            Done::Msg(ReadMsg::Done(i, fp)) => consume(Step::Done(i, fp))?,
                            Done::Msg(ReadMsg::Failed(e)) => return Err(e),
                            Done::Msg(ReadMsg::Chunk(_)) => unreachable!("chunks are worked on"),
                        }
                    }
                }
                if !waiting.is_empty() {
                    return Err(Error::Invalid("internal: a worker stopped early".into()));
                }
                Ok(())
            })();
            // Unblock everyone: workers waiting for an output or sending one,
            // and through them the reader.
            drop(done_rx);
            drop(pool_tx);
            drop(spare_tx);
            let workers: Vec<W> = handles
                .into_iter()
                .map(|h| h.join().expect("a worker panicked"))
                .collect();
            result.map(|_| workers)
        })
    }
}
