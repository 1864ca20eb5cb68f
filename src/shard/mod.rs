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
use std::io::BufWriter;
use std::path::{Path, PathBuf};

use crate::container::{
    self, cast_section, AlignedBytes, Container, ContainerWriter, FileBytes, Kind, SectionSink,
    StreamSection,
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
        if cols == 0 || cols > u32::MAX as u64 + 1 {
            return Err(Error::Corrupt {
                path: p(),
                what: format!("column count {cols} out of range"),
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
    sink: Option<SectionSink<BufWriter<File>>>,
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
            sink: Some(SectionSink::new(BufWriter::with_capacity(1 << 16, f))),
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

    /// Flush and copy this side file into the shard as section `id`.
    fn copy_into(mut self, id: u32, w: &mut ContainerWriter) -> Result<()> {
        let sink = self.sink.take().expect("open until copied");
        let (len, sum) = (sink.len(), sink.checksum());
        let mut f = sink
            .into_inner()
            .into_inner()
            .map_err(|e| e.into_error())
            .at(&self.path)?;
        w.section_from_file(id, &mut f, &self.path, len, sum)
    }
}

impl Drop for Side {
    fn drop(&mut self) {
        // Side files never outlive their shard writer, whether it finished or not.
        self.sink = None;
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Writes one shard, row by row, with bounded memory.
pub struct ShardWriter {
    dest: PathBuf,
    w: ContainerWriter,
    indices: StreamSection,
    values: Side,
    indptr: Side,
    labels: Side,
    rows: u64,
    nnz: u64,
    cols: u64,
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

impl ShardWriter {
    /// Start a shard at `dest` with `cols` columns.
    pub fn create(dest: &Path, cols: u64) -> Result<Self> {
        let mut w = ContainerWriter::create(dest, Kind::Shard, VERSION, 4)?;
        let indices = w.begin_stream()?;
        let side = |ext: &str| {
            let mut name = dest.as_os_str().to_owned();
            name.push(format!(".{ext}.tmp-{}", std::process::id()));
            Side::create(PathBuf::from(name))
        };
        let mut indptr = side("indptr")?;
        indptr.write(&0u64.to_le_bytes())?;
        Ok(ShardWriter {
            dest: dest.to_path_buf(),
            w,
            indices,
            values: side("values")?,
            indptr,
            labels: side("labels")?,
            rows: 0,
            nnz: 0,
            cols,
        })
    }

    /// Append one row. `indices` must be strictly increasing and below the column
    /// count (the featurizer guarantees this).
    pub fn push(&mut self, label: u32, indices: &[u32], values: &[f32]) -> Result<()> {
        debug_assert_eq!(indices.len(), values.len());
        debug_assert!(indices.windows(2).all(|w| w[0] < w[1]));
        self.w
            .stream(&mut self.indices, bytemuck::cast_slice(indices))?;
        self.values.write(bytemuck::cast_slice(values))?;
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

    /// Assemble the sections, write the header and rename the shard into place.
    /// The file is synced; the caller syncs the folder.
    pub fn finish(self) -> Result<ShardInfo> {
        let ShardWriter {
            dest,
            mut w,
            indices,
            values,
            indptr,
            labels,
            rows,
            nnz,
            cols,
        } = self;
        w.end_stream(SEC_INDICES, indices)?;
        values.copy_into(SEC_VALUES, &mut w)?;
        indptr.copy_into(SEC_INDPTR, &mut w)?;
        labels.copy_into(SEC_LABELS, &mut w)?;
        w.set_params([rows, nnz, cols, 0]);
        w.finish()?;
        let meta = std::fs::metadata(&dest).at(&dest)?;
        let shard = Shard::open(&dest)?;
        Ok(ShardInfo {
            checksum: shard.header_checksum(),
            path: dest,
            rows,
            nnz,
            bytes: meta.len(),
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
