//! Shards: write-once CSR files of hashed rows.
//!
//! A shard is a [`crate::container`] file of kind 1 (format version
//! [`VERSION`]) with four sections, each aligned so that a memory map of the file
//! is viewed without a copy as an `sprs` CSR matrix:
//!
//! | id | section   | contents                                    |
//! |----|-----------|---------------------------------------------|
//! | 1  | `indices` | `u32` column (bucket) of every nonzero      |
//! | 2  | `values`  | `f32` value of every nonzero                |
//! | 3  | `indptr`  | `u64` row offsets, `rows + 1` entries        |
//! | 4  | `labels`  | `u32` class id of every row                  |
//!
//! Header parameters: rows, nonzeros, columns (2^log2_buckets), 0.
//!
//! The writer streams `indices` straight into the shard file and the three other
//! sections into side files in the same folder that are copied in when the shard
//! is finished, so a writer holds only small buffers however large the shard grows.

use std::fs::{File, OpenOptions};
use std::path::{Path, PathBuf};

use std::io::Read;

use crate::container::{
    self, cast_section, AlignedBytes, AtomicFile, Container, FileBytes, Header, Kind, SectionEntry,
    SectionSink,
};
use crate::error::{Error, IoContext, Result};

/// Current shard format version.
pub const VERSION: u32 = 1;
/// Oldest shard format version this build reads.
pub const OLDEST_VERSION: u32 = 1;

const SEC_INDICES: u32 = 1;
const SEC_VALUES: u32 = 2;
const SEC_INDPTR: u32 = 3;
const SEC_LABELS: u32 = 4;

/// Name of a shard section, for messages.
pub fn section_name(id: u32) -> String {
    match id {
        SEC_INDICES => "indices".into(),
        SEC_VALUES => "values".into(),
        SEC_INDPTR => "indptr".into(),
        SEC_LABELS => "labels".into(),
        other => format!("unknown section {other}"),
    }
}

/// One row of a shard.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row<'a> {
    /// Class id.
    pub label: u32,
    /// Bucket indices, strictly increasing.
    pub indices: &'a [u32],
    /// Values, one per index.
    pub values: &'a [f32],
}

/// A read-only shard over any byte storage.
///
/// Opening checks the header, the section bounds and sizes and the row offsets
/// (monotone, ending at the nonzero count), so [`Shard::row`] never slices out of
/// bounds. Column indices and values are only checked by [`Shard::verify`];
/// consumers index their weights with indices masked to the column count.
pub struct Shard<B: AsRef<[u8]> = FileBytes> {
    c: Container<B>,
    rows: usize,
    nnz: usize,
    cols: u64,
    // Byte ranges of the sections inside the file.
    indices: (usize, usize),
    values: (usize, usize),
    indptr: (usize, usize),
    labels: (usize, usize),
}

impl Shard<FileBytes> {
    /// Map and open a shard file.
    pub fn open(path: &Path) -> Result<Self> {
        Shard::from_bytes(container::map_file(path)?, path)
    }
}

impl Shard<AlignedBytes> {
    /// Read a shard file into memory (used by tests and small tools).
    pub fn read(path: &Path) -> Result<Self> {
        Shard::from_bytes(AlignedBytes::read(path)?, path)
    }
}

impl<B: AsRef<[u8]>> Shard<B> {
    /// Parse a shard held in `bytes`, which must be 8-byte aligned (a memory map
    /// or [`AlignedBytes`]).
    pub fn from_bytes(bytes: B, path: &Path) -> Result<Self> {
        let c = Container::parse(bytes, path, Kind::Shard, OLDEST_VERSION..=VERSION)?;
        let [rows, nnz, cols, _] = c.header().params;
        let p = || path.to_path_buf();
        let range = |id: u32| -> Result<(usize, usize)> {
            let s = c
                .header()
                .sections
                .iter()
                .find(|s| s.id == id)
                .ok_or_else(|| Error::Corrupt {
                    path: p(),
                    what: format!("section {} is missing", section_name(id)),
                })?;
            Ok((s.offset as usize, (s.offset + s.len) as usize))
        };
        let (indices, values, indptr, labels) = (
            range(SEC_INDICES)?,
            range(SEC_VALUES)?,
            range(SEC_INDPTR)?,
            range(SEC_LABELS)?,
        );
        let want = |what: &str, (a, b): (usize, usize), n: u64, width: u64| -> Result<()> {
            let expected = n.checked_mul(width).ok_or_else(|| Error::Corrupt {
                path: p(),
                what: format!("{what}: count {n} overflows"),
            })?;
            if (b - a) as u64 != expected {
                return Err(Error::Size {
                    path: p(),
                    what: format!("section {what}"),
                    expected,
                    got: (b - a) as u64,
                });
            }
            Ok(())
        };
        want("indices", indices, nnz, 4)?;
        want("values", values, nnz, 4)?;
        want("indptr", indptr, rows.saturating_add(1), 8)?;
        want("labels", labels, rows, 4)?;
        if !cols.is_power_of_two() || cols > 1 << 31 {
            return Err(Error::Corrupt {
                path: p(),
                what: format!("column count {cols} is not a power of two up to 2^31"),
            });
        }
        let shard = Shard {
            rows: rows as usize,
            nnz: nnz as usize,
            cols,
            indices,
            values,
            indptr,
            labels,
            c,
        };
        // Alignment and offsets: cheap (8 bytes per row) and needed for safe slicing.
        let ptr = shard.try_indptr()?;
        shard.try_indices()?;
        shard.try_values()?;
        shard.try_labels()?;
        if ptr[0] != 0 || ptr[shard.rows] != nnz {
            return Err(Error::Corrupt {
                path: p(),
                what: format!(
                    "row offsets run from {} to {}, expected 0 to {nnz}",
                    ptr[0], ptr[shard.rows]
                ),
            });
        }
        if let Some(i) = ptr.windows(2).position(|w| w[0] > w[1]) {
            return Err(Error::Corrupt {
                path: p(),
                what: format!("row offsets decrease at row {i}"),
            });
        }
        Ok(shard)
    }

    fn slice(&self, (a, b): (usize, usize)) -> &[u8] {
        &self.c.bytes()[a..b]
    }

    fn try_indptr(&self) -> Result<&[u64]> {
        cast_section(self.slice(self.indptr), self.c.path(), "indptr")
    }
    fn try_indices(&self) -> Result<&[u32]> {
        cast_section(self.slice(self.indices), self.c.path(), "indices")
    }
    fn try_values(&self) -> Result<&[f32]> {
        cast_section(self.slice(self.values), self.c.path(), "values")
    }
    fn try_labels(&self) -> Result<&[u32]> {
        cast_section(self.slice(self.labels), self.c.path(), "labels")
    }

    /// Row offsets (`rows + 1` entries).
    pub fn indptr(&self) -> &[u64] {
        bytemuck::cast_slice(self.slice(self.indptr))
    }
    /// Column index of every nonzero.
    pub fn indices(&self) -> &[u32] {
        bytemuck::cast_slice(self.slice(self.indices))
    }
    /// Value of every nonzero.
    pub fn values(&self) -> &[f32] {
        bytemuck::cast_slice(self.slice(self.values))
    }
    /// Class id of every row.
    pub fn labels(&self) -> &[u32] {
        bytemuck::cast_slice(self.slice(self.labels))
    }

    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.rows
    }
    /// Number of stored nonzeros.
    pub fn nnz(&self) -> usize {
        self.nnz
    }
    /// Number of columns (hash buckets).
    pub fn cols(&self) -> u64 {
        self.cols
    }
    /// The file this shard was read from.
    pub fn path(&self) -> &Path {
        self.c.path()
    }
    /// The checksum of the header, which covers every section checksum; the
    /// manifest records it to tie a shard file to its entry.
    pub fn header_checksum(&self) -> u64 {
        header_checksum(self.c.bytes(), self.c.header().sections.len())
    }

    /// Row `i` (panics if `i >= rows()`; the offsets were checked on open).
    pub fn row(&self, i: usize) -> Row<'_> {
        let ptr = self.indptr();
        let (a, b) = (ptr[i] as usize, ptr[i + 1] as usize);
        Row {
            label: self.labels()[i],
            indices: &self.indices()[a..b],
            values: &self.values()[a..b],
        }
    }

    /// The whole shard as an `sprs` CSR matrix view, without copying. The
    /// structure is checked by `sprs` (indices sorted and in range).
    pub fn csr(&self) -> Result<sprs::CsMatViewI<'_, f32, u32, u64>> {
        sprs::CsMatViewI::try_new(
            (self.rows, self.cols as usize),
            self.indptr(),
            self.indices(),
            self.values(),
        )
        .map_err(|(_, _, _, e)| Error::Corrupt {
            path: self.path().to_path_buf(),
            what: format!("not a valid CSR matrix: {e}"),
        })
    }

    /// Full check: every section checksum, zero padding, indices strictly
    /// increasing inside each row and below the column count, finite values, and
    /// labels below `n_labels` when given.
    pub fn verify(&self, n_labels: Option<u32>) -> Result<()> {
        self.c.verify(section_name)?;
        let p = || self.path().to_path_buf();
        let ptr = self.indptr();
        let idx = self.indices();
        for r in 0..self.rows {
            let row = &idx[ptr[r] as usize..ptr[r + 1] as usize];
            if row.windows(2).any(|w| w[0] >= w[1]) {
                return Err(Error::Corrupt {
                    path: p(),
                    what: format!("row {r}: column indices not strictly increasing"),
                });
            }
            if let Some(&last) = row.last() {
                if last as u64 >= self.cols {
                    return Err(Error::Corrupt {
                        path: p(),
                        what: format!("row {r}: column {last} >= {}", self.cols),
                    });
                }
            }
        }
        if let Some(i) = self.values().iter().position(|v| !v.is_finite()) {
            return Err(Error::Corrupt {
                path: p(),
                what: format!("value {i} is not finite"),
            });
        }
        if let Some(n) = n_labels {
            if let Some(i) = self.labels().iter().position(|&l| l >= n) {
                return Err(Error::Corrupt {
                    path: p(),
                    what: format!("row {i}: class id {} >= {n} classes", self.labels()[i]),
                });
            }
        }
        Ok(())
    }
}

fn header_checksum(bytes: &[u8], sections: usize) -> u64 {
    let at = 64 + 32 * sections;
    u64::from_le_bytes(bytes[at..at + 8].try_into().expect("checked on open"))
}

/// A side file holding one section while a shard is being written.
struct Side {
    path: PathBuf,
    sink: Option<SectionSink<File>>,
}

impl Side {
    fn create(path: PathBuf) -> Result<Side> {
        let f = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&path)
            .at(&path)?;
        Ok(Side {
            sink: Some(SectionSink::new(f)),
            path,
        })
    }

    fn write(&mut self, b: &[u8]) -> Result<()> {
        self.sink
            .as_mut()
            .expect("open until copied")
            .write(b)
            .at(&self.path)
    }

    /// A placeholder that owns no file.
    fn empty() -> Side {
        Side {
            path: PathBuf::new(),
            sink: None,
        }
    }

    /// Flush and copy this side file to the current position of `out`; returns
    /// its length and checksum.
    fn copy_to(mut self, mut out: &File) -> Result<(u64, u64)> {
        use std::io::{Seek, SeekFrom};
        let sink = self.sink.take().expect("open until copied");
        let (mut f, len, sum) = sink.finish().at(&self.path)?;
        f.seek(SeekFrom::Start(0)).at(&self.path)?;
        let copied = std::io::copy(&mut (&f).take(len), &mut out).at(&self.path)?;
        if copied != len {
            return Err(Error::Size {
                path: self.path.clone(),
                what: "temporary section file".into(),
                expected: len,
                got: copied,
            });
        }
        Ok((len, sum))
    }
}

impl Drop for Side {
    fn drop(&mut self) {
        // Side files never outlive their shard writer, whether it finished or not.
        self.sink = None;
        if !self.path.as_os_str().is_empty() {
            let _ = std::fs::remove_file(&self.path);
        }
    }
}

/// What a finished shard looks like, for the manifest.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ShardInfo {
    /// Final path.
    pub path: PathBuf,
    /// Rows written.
    pub rows: u64,
    /// Nonzeros written.
    pub nnz: u64,
    /// Header checksum (covers every section checksum).
    pub checksum: u64,
    /// File size in bytes.
    pub bytes: u64,
}

/// Entries gathered in memory before a positioned write.
const PENDING: usize = 1 << 16;

/// Default capacity of a shard in nonzeros (32 MiB of indices, 32 MiB of values).
pub const DEFAULT_NNZ_CAPACITY: u64 = 1 << 23;

/// A section written in place at a fixed offset of the shard file, in blocks,
/// checksummed as it goes.
struct Region<T: bytemuck::Pod> {
    offset: u64,
    written: u64,
    pending: Vec<T>,
    hash: xxhash_rust::xxh3::Xxh3,
}

impl<T: bytemuck::Pod> Region<T> {
    fn new(offset: u64) -> Self {
        Region {
            offset,
            written: 0,
            pending: Vec::with_capacity(PENDING),
            hash: xxhash_rust::xxh3::Xxh3::new(),
        }
    }

    fn flush(&mut self, f: &File, path: &Path) -> Result<()> {
        use std::os::unix::fs::FileExt;
        if self.pending.is_empty() {
            return Ok(());
        }
        let bytes: &[u8] = bytemuck::cast_slice(&self.pending);
        self.hash.update(bytes);
        f.write_all_at(bytes, self.offset + self.written).at(path)?;
        self.written += bytes.len() as u64;
        self.pending.clear();
        Ok(())
    }

    #[inline]
    fn extend(&mut self, items: &[T], f: &File, path: &Path) -> Result<()> {
        if self.pending.len() + items.len() > PENDING {
            self.flush(f, path)?;
        }
        self.pending.extend_from_slice(items);
        Ok(())
    }
}

/// Writes one shard, row by row, with bounded memory.
///
/// The shard is created for a capacity of `nnz_capacity` nonzeros: the
/// `indices` section starts after the header and `values` at a fixed offset
/// after room for that many indices, so both are written in place as rows arrive
/// (no copy). Row offsets and labels, 12 bytes a row, go to side files that are
/// appended when the shard is finished. A shard that ends well short of its
/// capacity has its values moved down so the file holds no large gap.
pub struct ShardWriter {
    file: AtomicFile,
    handle: File,
    indices: Region<u32>,
    values: Region<f32>,
    indptr: Side,
    labels: Side,
    rows: u64,
    nnz: u64,
    capacity: u64,
    cols: u64,
}

/// Sections of a shard.
const SECTIONS: usize = 4;

impl ShardWriter {
    /// Start a shard at `dest` with `cols` columns and room for
    /// [`DEFAULT_NNZ_CAPACITY`] nonzeros.
    pub fn create(dest: &Path, cols: u64) -> Result<Self> {
        Self::with_capacity(dest, cols, DEFAULT_NNZ_CAPACITY)
    }

    /// Start a shard with room for `nnz_capacity` nonzeros.
    pub fn with_capacity(dest: &Path, cols: u64, nnz_capacity: u64) -> Result<Self> {
        if !cols.is_power_of_two() || cols > 1 << 31 {
            return Err(Error::Invalid(format!(
                "a shard needs a power-of-two column count up to 2^31, not {cols}"
            )));
        }
        let mut file = AtomicFile::create(dest)?;
        let tmp = file.tmp_path().to_path_buf();
        let handle = file.file().try_clone().at(&tmp)?;
        let idx_at = container::header_len(SECTIONS);
        let val_at = container::align_up(idx_at + 4 * nnz_capacity);
        let side = |ext: &str| {
            let mut name = dest.as_os_str().to_owned();
            name.push(format!(".{ext}.tmp-{}", std::process::id()));
            Side::create(PathBuf::from(name))
        };
        let mut indptr = side("indptr")?;
        indptr.write(&0u64.to_le_bytes())?;
        Ok(ShardWriter {
            file,
            handle,
            indices: Region::new(idx_at),
            values: Region::new(val_at),
            indptr,
            labels: side("labels")?,
            rows: 0,
            nnz: 0,
            capacity: nnz_capacity,
            cols,
        })
    }

    /// Whether a row of `nnz` nonzeros still fits.
    pub fn fits(&self, nnz: usize) -> bool {
        self.nnz + nnz as u64 <= self.capacity
    }

    /// Append one row. `indices` must be strictly increasing and below the column
    /// count (the featurizer guarantees this), and the row must fit.
    pub fn push(&mut self, label: u32, indices: &[u32], values: &[f32]) -> Result<()> {
        debug_assert_eq!(indices.len(), values.len());
        debug_assert!(indices.windows(2).all(|w| w[0] < w[1]));
        if !self.fits(indices.len()) {
            return Err(Error::Invalid(format!(
                "internal: row of {} nonzeros does not fit in shard {}",
                indices.len(),
                self.file.dest().display()
            )));
        }
        let path = self.file.tmp_path();
        self.indices.extend(indices, &self.handle, path)?;
        self.values.extend(values, &self.handle, path)?;
        self.nnz += indices.len() as u64;
        self.rows += 1;
        self.indptr.write(&self.nnz.to_le_bytes())?;
        self.labels.write(&label.to_le_bytes())?;
        Ok(())
    }

    /// Rows written so far.
    pub fn rows(&self) -> u64 {
        self.rows
    }

    /// Nonzeros written so far.
    pub fn nnz(&self) -> u64 {
        self.nnz
    }

    /// Assemble the sections, write the header and rename the shard into place.
    /// The file and its folder are synced.
    pub fn finish(self) -> Result<ShardInfo> {
        self.finish_with(true)
    }

    /// As [`ShardWriter::finish`]; with `sync` false the shard is renamed into
    /// place unsynced, and the caller must sync it (with
    /// [`crate::container::sync_file`]) before anything refers to it.
    pub fn finish_with(mut self, sync: bool) -> Result<ShardInfo> {
        use std::io::{Seek, SeekFrom, Write};
        use std::os::unix::fs::FileExt;
        let tmp = self.file.tmp_path().to_path_buf();
        self.indices.flush(&self.handle, &tmp)?;
        self.values.flush(&self.handle, &tmp)?;
        let idx_len = 4 * self.nnz;
        let idx_end = self.indices.offset + idx_len;
        let mut val_at = self.values.offset;
        let val_len = 4 * self.nnz;
        // Move the values down when the shard ended well short of its capacity.
        let packed_at = container::align_up(idx_end);
        if val_at - packed_at > 1 << 20 {
            let mut buf = vec![0u8; 1 << 20];
            let mut done = 0;
            while done < val_len {
                let n = (val_len - done).min(buf.len() as u64) as usize;
                self.handle
                    .read_exact_at(&mut buf[..n], val_at + done)
                    .at(&tmp)?;
                self.handle
                    .write_all_at(&buf[..n], packed_at + done)
                    .at(&tmp)?;
                done += n as u64;
            }
            // Zero what lies between the moved values and their old end, so the
            // padding check of `verify` holds.
            let stale_from = packed_at + val_len;
            let stale_to = val_at + val_len;
            if stale_to > stale_from {
                self.handle.set_len(stale_from).at(&tmp)?;
            }
            val_at = packed_at;
        }
        let mut end = val_at + val_len;
        let mut entries = vec![
            SectionEntry {
                id: SEC_INDICES,
                offset: self.indices.offset,
                len: idx_len,
                checksum: self.indices.hash.digest(),
            },
            SectionEntry {
                id: SEC_VALUES,
                offset: val_at,
                len: val_len,
                checksum: self.values.hash.digest(),
            },
        ];
        self.handle.set_len(end).at(&tmp)?;
        let mut out = &self.handle;
        for (id, side) in [
            (
                SEC_INDPTR,
                std::mem::replace(&mut self.indptr, Side::empty()),
            ),
            (
                SEC_LABELS,
                std::mem::replace(&mut self.labels, Side::empty()),
            ),
        ] {
            let at = container::align_up(end);
            self.handle.set_len(at).at(&tmp)?;
            out.seek(SeekFrom::Start(at)).at(&tmp)?;
            let (len, sum) = side.copy_to(out)?;
            entries.push(SectionEntry {
                id,
                offset: at,
                len,
                checksum: sum,
            });
            end = at + len;
        }
        let header = Header {
            kind: Kind::Shard,
            version: VERSION,
            file_len: end,
            params: [self.rows, self.nnz, self.cols, 0],
            sections: entries,
        };
        out.flush().at(&tmp)?;
        self.handle.write_all_at(&header.to_bytes(), 0).at(&tmp)?;
        let dest = self.file.dest().to_path_buf();
        let (rows, nnz) = (self.rows, self.nnz);
        drop(self.handle);
        if sync {
            self.file.commit()?;
        } else {
            self.file.commit_unsynced()?;
        }
        let shard = Shard::open(&dest)?;
        Ok(ShardInfo {
            checksum: shard.header_checksum(),
            path: dest,
            rows,
            nnz,
            bytes: end,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(dir: &Path, rows: &[(u32, Vec<u32>, Vec<f32>)]) -> PathBuf {
        let path = dir.join("s.tms");
        let mut w = ShardWriter::create(&path, 1 << 10).unwrap();
        for (l, i, v) in rows {
            w.push(*l, i, v).unwrap();
        }
        let info = w.finish().unwrap();
        assert_eq!(info.rows, rows.len() as u64);
        path
    }

    #[test]
    fn round_trip_map_and_csr() {
        let dir = tempfile::tempdir().unwrap();
        let rows = vec![
            (0, vec![1, 5, 9], vec![0.5, -0.25, 1.0]),
            (2, vec![], vec![]),
            (1, vec![1023], vec![3.0]),
        ];
        let path = write(dir.path(), &rows);
        let s = Shard::open(&path).unwrap();
        s.verify(Some(3)).unwrap();
        assert_eq!(s.rows(), 3);
        assert_eq!(s.nnz(), 4);
        for (i, (l, idx, val)) in rows.iter().enumerate() {
            let r = s.row(i);
            assert_eq!((r.label, r.indices, r.values), (*l, &idx[..], &val[..]));
        }
        let m = s.csr().unwrap();
        assert_eq!(m.shape(), (3, 1024));
        assert_eq!(m.get(0, 5), Some(&-0.25));
        assert_eq!(m.get(2, 1023), Some(&3.0));
        // No side files are left behind.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
        assert!(matches!(s.verify(Some(2)), Err(Error::Corrupt { .. })));
    }

    #[test]
    fn capacity_full_partial_and_refused() {
        let dir = tempfile::tempdir().unwrap();
        for cap in [4u64, 6, 1 << 20] {
            let path = dir.path().join(format!("c{cap}.tms"));
            let mut w = ShardWriter::with_capacity(&path, 64, cap).unwrap();
            w.push(1, &[1, 2], &[0.5, 0.25]).unwrap();
            w.push(0, &[3, 63], &[1.0, -1.0]).unwrap();
            assert_eq!(w.fits(3), cap >= 7);
            if cap == 4 {
                assert!(w.push(0, &[5], &[1.0]).is_err());
            }
            let info = w.finish().unwrap();
            let s = Shard::open(&path).unwrap();
            s.verify(Some(2)).unwrap();
            assert_eq!(s.row(1).indices, &[3, 63]);
            assert_eq!(s.row(1).values, &[1.0, -1.0]);
            // Values were moved down when the gap was large: the file stays small.
            assert!(info.bytes < 4096, "{cap}: {} bytes", info.bytes);
        }
    }

    #[test]
    fn empty_shard_is_valid() {
        let dir = tempfile::tempdir().unwrap();
        let path = write(dir.path(), &[]);
        let s = Shard::read(&path).unwrap();
        s.verify(None).unwrap();
        assert_eq!((s.rows(), s.nnz()), (0, 0));
    }

    #[test]
    fn dropped_writer_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.tms");
        let mut w = ShardWriter::create(&path, 16).unwrap();
        w.push(0, &[1], &[1.0]).unwrap();
        drop(w);
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
    }
}
