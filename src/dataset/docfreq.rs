//! Per-bucket document frequencies of one ingest batch.
//!
//! A [`crate::container`] file of kind 2 (version [`VERSION`]). Header
//! parameters: log2 of the bucket count, training rows counted, batch number, 0.
//! One section (id 1): a `u32` per bucket, the number of training rows in which
//! the bucket is nonzero (saturating at `u32::MAX`).

use std::path::Path;

use crate::container::{self, cast_section, Container, ContainerWriter, Kind};
use crate::error::{Error, Result};

/// Current format version.
pub const VERSION: u32 = 1;
const SEC_COUNTS: u32 = 1;

/// Write counts for `rows` training rows of batch `batch`. Returns the header
/// checksum.
pub fn write(path: &Path, log2_buckets: u32, rows: u64, batch: u32, counts: &[u32]) -> Result<u64> {
    let mut w = ContainerWriter::create(path, Kind::DocFreq, VERSION, 1)?;
    w.section(SEC_COUNTS, bytemuck::cast_slice(counts))?;
    w.set_params([log2_buckets as u64, rows, batch as u64, 0]);
    w.finish()?;
    let bytes = container::map_file(path)?;
    let c = Container::parse(bytes, path, Kind::DocFreq, VERSION..=VERSION)?;
    Ok(header_checksum(&c))
}

fn header_checksum<B: AsRef<[u8]>>(c: &Container<B>) -> u64 {
    let at = 64 + 32 * c.header().sections.len();
    u64::from_le_bytes(c.bytes()[at..at + 8].try_into().expect("checked on parse"))
}

/// An opened document-frequency file.
pub struct DocFreq {
    c: Container<container::FileBytes>,
}

impl DocFreq {
    /// Open and check the header; `verify` also checks the counts' checksum.
    pub fn open(path: &Path, verify: bool) -> Result<DocFreq> {
        let c = Container::parse(
            container::map_file(path)?,
            path,
            Kind::DocFreq,
            VERSION..=VERSION,
        )?;
        if verify {
            c.verify(|_| "counts".into())?;
        }
        let d = DocFreq { c };
        let n = d.counts()?.len() as u64;
        if n != 1u64 << d.log2_buckets().min(63) {
            return Err(Error::Size {
                path: path.to_path_buf(),
                what: "counts section (entries)".into(),
                expected: 1u64 << d.log2_buckets().min(63),
                got: n,
            });
        }
        Ok(d)
    }

    /// log2 of the bucket count.
    pub fn log2_buckets(&self) -> u32 {
        self.c.header().params[0] as u32
    }

    /// Training rows counted.
    pub fn rows(&self) -> u64 {
        self.c.header().params[1]
    }

    /// The header checksum.
    pub fn checksum(&self) -> u64 {
        header_checksum(&self.c)
    }

    /// Count per bucket.
    pub fn counts(&self) -> Result<&[u32]> {
        cast_section(
            self.c.section(SEC_COUNTS, "counts")?,
            self.c.path(),
            "counts",
        )
    }
}

/// Counts document frequencies on one thread with a small cache footprint:
/// one byte per bucket, carried into a `u32` total every 256 rows.
pub struct DocCounter {
    small: Vec<u8>,
    big: Vec<u32>,
}

impl DocCounter {
    /// A counter for `buckets` buckets.
    pub fn new(buckets: usize) -> Self {
        DocCounter {
            small: vec![0; buckets],
            big: vec![0; buckets],
        }
    }

    /// Count one row in which bucket `i` is nonzero.
    #[inline]
    pub fn add(&mut self, i: usize) {
        let c = &mut self.small[i];
        if *c == u8::MAX {
            self.big[i] = self.big[i].saturating_add(256);
            *c = 0;
        } else {
            *c += 1;
        }
    }

    /// Add these counts into `total` (saturating; the result does not depend on
    /// the order in which counters are added).
    pub fn add_into(&self, total: &mut [u32]) {
        for ((t, &b), &s) in total.iter_mut().zip(&self.big).zip(&self.small) {
            *t = t.saturating_add(b.saturating_add(s as u32));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counter_carries_exactly() {
        let mut c = DocCounter::new(4);
        for _ in 0..1000 {
            c.add(1);
        }
        c.add(3);
        let mut t = vec![0u32; 4];
        c.add_into(&mut t);
        c.add_into(&mut t);
        assert_eq!(t, [0, 2000, 0, 2]);
    }

    #[test]
    fn write_open_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("d.tmd");
        let counts: Vec<u32> = (0..1024).map(|i| i * 3).collect();
        let sum = write(&p, 10, 77, 2, &counts).unwrap();
        let d = DocFreq::open(&p, true).unwrap();
        assert_eq!((d.log2_buckets(), d.rows(), d.checksum()), (10, 77, sum));
        assert_eq!(d.counts().unwrap(), &counts[..]);
    }
}
