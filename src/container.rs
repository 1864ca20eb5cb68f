//! The binary container shared by every binary file tamis writes.
//!
//! A container is a fixed little-endian header, a section table and the sections
//! themselves, each section starting on a 64-byte boundary:
//!
//! ```text
//! offset  size  field
//!      0     8  magic  89 54 41 4D 49 53 0D 0A  ("\x89TAMIS\r\n")
//!      8     4  kind   (1 shard, 2 document frequencies, 3 model, 4 checkpoint,
//!                      5 token sketch)
//!     12     4  format version of that kind
//!     16     4  section count S
//!     20     4  reserved, zero
//!     24     8  file length in bytes
//!     32    32  four kind-specific u64 parameters (a shard: rows, nnz, columns, 0)
//!     64  32*S  section table: id u32, reserved u32, offset u64, length u64, xxh3 u64
//!  64+32S    8  xxh3-64 (seed 0) of every header byte before it
//! ```
//!
//! Bytes between sections are zero; [`Container::verify`] checks them along with
//! every section's checksum, so no byte of a file escapes a check.
//!
//! Files are written under a temporary name in the destination folder, synced,
//! renamed into place and the folder synced ([`AtomicFile`]); a crash leaves
//! either the old file or the new one, never a mixture.

use std::fs::{File, OpenOptions};
use std::io::{self, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use xxhash_rust::xxh3::{xxh3_64, Xxh3};

use crate::error::{Error, IoContext, Result};

/// The eight magic bytes at the start of every tamis binary file.
pub const MAGIC: [u8; 8] = *b"\x89TAMIS\r\n";
/// Sections start at multiples of this many bytes.
pub const ALIGN: u64 = 64;
/// Bytes of the fixed part of the header.
const FIXED: usize = 64;
/// Bytes per section-table entry.
const ENTRY: usize = 32;
/// Upper bound on sections, so a damaged count cannot make us allocate much.
const MAX_SECTIONS: u32 = 64;

/// The kinds of binary file tamis writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u32)]
pub enum Kind {
    /// A CSR shard of hashed rows.
    Shard = 1,
    /// Per-bucket document frequencies of one ingest batch.
    DocFreq = 2,
    /// A trained model.
    Model = 3,
    /// A training checkpoint.
    Checkpoint = 4,
    /// The token sketch of one ingest batch.
    TokenSketch = 5,
}

impl Kind {
    /// A human-readable name used in messages.
    pub fn name(self) -> &'static str {
        match self {
            Kind::Shard => "shard",
            Kind::DocFreq => "document-frequency",
            Kind::Model => "model",
            Kind::Checkpoint => "checkpoint",
            Kind::TokenSketch => "token-sketch",
        }
    }

    /// The kind with the given number, if any.
    pub fn from_u32(v: u32) -> Option<Kind> {
        match v {
            1 => Some(Kind::Shard),
            2 => Some(Kind::DocFreq),
            3 => Some(Kind::Model),
            4 => Some(Kind::Checkpoint),
            5 => Some(Kind::TokenSketch),
            _ => None,
        }
    }
}

/// One entry of the section table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SectionEntry {
    /// Section identifier, meaningful for the file's kind.
    pub id: u32,
    /// Offset from the start of the file (a multiple of [`ALIGN`]).
    pub offset: u64,
    /// Length in bytes.
    pub len: u64,
    /// xxh3-64 (seed 0) of the section's bytes.
    pub checksum: u64,
}

/// The parsed header of a container.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Header {
    /// File kind.
    pub kind: Kind,
    /// Format version of that kind.
    pub version: u32,
    /// Total file length in bytes.
    pub file_len: u64,
    /// Kind-specific parameters.
    pub params: [u64; 4],
    /// Section table in file order.
    pub sections: Vec<SectionEntry>,
}

/// Bytes taken by a header with `n` sections, padded to [`ALIGN`].
pub fn header_len(n: usize) -> u64 {
    align_up((FIXED + ENTRY * n + 8) as u64)
}

/// Round `x` up to a multiple of [`ALIGN`].
pub fn align_up(x: u64) -> u64 {
    x.div_ceil(ALIGN) * ALIGN
}

impl Header {
    /// Serialise the header, including its checksum and zero padding.
    pub fn to_bytes(&self) -> Vec<u8> {
        let n = self.sections.len();
        let mut b = Vec::with_capacity(header_len(n) as usize);
        b.extend_from_slice(&MAGIC);
        b.extend_from_slice(&(self.kind as u32).to_le_bytes());
        b.extend_from_slice(&self.version.to_le_bytes());
        b.extend_from_slice(&(n as u32).to_le_bytes());
        b.extend_from_slice(&0u32.to_le_bytes());
        b.extend_from_slice(&self.file_len.to_le_bytes());
        for p in self.params {
            b.extend_from_slice(&p.to_le_bytes());
        }
        for s in &self.sections {
            b.extend_from_slice(&s.id.to_le_bytes());
            b.extend_from_slice(&0u32.to_le_bytes());
            b.extend_from_slice(&s.offset.to_le_bytes());
            b.extend_from_slice(&s.len.to_le_bytes());
            b.extend_from_slice(&s.checksum.to_le_bytes());
        }
        let sum = xxh3_64(&b);
        b.extend_from_slice(&sum.to_le_bytes());
        b.resize(header_len(n) as usize, 0);
        b
    }

    /// Parse and check a header: magic, kind, version range, header checksum, file
    /// length and that every section lies inside the file, aligned and in order.
    pub fn parse(
        bytes: &[u8],
        path: &Path,
        kind: Kind,
        versions: std::ops::RangeInclusive<u32>,
    ) -> Result<Header> {
        let p = || path.to_path_buf();
        if bytes.len() < 8 || bytes[..8] != MAGIC {
            return Err(Error::BadMagic {
                path: p(),
                expected: kind.name(),
            });
        }
        if bytes.len() < FIXED + 8 {
            return Err(Error::Size {
                path: p(),
                what: "header".into(),
                expected: (FIXED + 8) as u64,
                got: bytes.len() as u64,
            });
        }
        let got_kind = u32_at(bytes, 8);
        if got_kind != kind as u32 {
            let what = match Kind::from_u32(got_kind) {
                Some(k) => format!("this is a {} file, not a {} file", k.name(), kind.name()),
                None => format!("unknown file kind {got_kind}"),
            };
            return Err(Error::Corrupt { path: p(), what });
        }
        let version = u32_at(bytes, 12);
        let count = u32_at(bytes, 16);
        if count > MAX_SECTIONS {
            return Err(Error::Corrupt {
                path: p(),
                what: format!("section count {count} exceeds {MAX_SECTIONS}"),
            });
        }
        let n = count as usize;
        let sum_at = FIXED + ENTRY * n;
        if bytes.len() < sum_at + 8 {
            return Err(Error::Size {
                path: p(),
                what: "header with section table".into(),
                expected: (sum_at + 8) as u64,
                got: bytes.len() as u64,
            });
        }
        let stored = u64_at(bytes, sum_at);
        let computed = xxh3_64(&bytes[..sum_at]);
        if stored != computed {
            return Err(Error::Checksum {
                path: p(),
                section: "header".into(),
                expected: stored,
                got: computed,
            });
        }
        // Only now that the header is known to be intact is the version meaningful.
        if !versions.contains(&version) {
            return Err(Error::Version {
                path: p(),
                oldest: *versions.start(),
                newest: *versions.end(),
                got: version,
            });
        }
        let file_len = u64_at(bytes, 24);
        if (bytes.len() as u64) < header_len(n) {
            return Err(Error::Size {
                path: p(),
                what: "padded header".into(),
                expected: header_len(n),
                got: bytes.len() as u64,
            });
        }
        if file_len != bytes.len() as u64 {
            return Err(Error::Size {
                path: p(),
                what: "file length".into(),
                expected: file_len,
                got: bytes.len() as u64,
            });
        }
        let mut params = [0u64; 4];
        for (i, slot) in params.iter_mut().enumerate() {
            *slot = u64_at(bytes, 32 + 8 * i);
        }
        let mut sections = Vec::with_capacity(n);
        let mut end = header_len(n);
        for i in 0..n {
            let e = FIXED + ENTRY * i;
            let s = SectionEntry {
                id: u32_at(bytes, e),
                offset: u64_at(bytes, e + 8),
                len: u64_at(bytes, e + 16),
                checksum: u64_at(bytes, e + 24),
            };
            let stop = s.offset.checked_add(s.len);
            if !s.offset.is_multiple_of(ALIGN)
                || s.offset < end
                || stop.is_none_or(|x| x > file_len)
            {
                return Err(Error::Corrupt {
                    path: p(),
                    what: format!(
                        "section {} at {}+{} lies outside the file or overlaps another",
                        s.id, s.offset, s.len
                    ),
                });
            }
            end = stop.unwrap_or(file_len);
            sections.push(s);
        }
        Ok(Header {
            kind,
            version,
            file_len,
            params,
            sections,
        })
    }
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().expect("4 bytes"))
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().expect("8 bytes"))
}

/// A parsed container over any byte storage (a memory map in production, a
/// vector in tests).
#[derive(Debug)]
pub struct Container<B> {
    bytes: B,
    header: Header,
    path: PathBuf,
}

impl<B: AsRef<[u8]>> Container<B> {
    /// Parse the header of `bytes` (see [`Header::parse`]). Section data is not
    /// read; call [`Container::verify`] for a full check.
    pub fn parse(
        bytes: B,
        path: &Path,
        kind: Kind,
        versions: std::ops::RangeInclusive<u32>,
    ) -> Result<Self> {
        let header = Header::parse(bytes.as_ref(), path, kind, versions)?;
        Ok(Container {
            bytes,
            header,
            path: path.to_path_buf(),
        })
    }

    /// The parsed header.
    pub fn header(&self) -> &Header {
        &self.header
    }

    /// The file this container came from.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// All bytes of the file.
    pub fn bytes(&self) -> &[u8] {
        self.bytes.as_ref()
    }

    /// The stored checksum of the header (it covers the section table, hence
    /// every section's checksum: a fingerprint of the whole file).
    pub fn header_checksum(&self) -> u64 {
        let at = FIXED + ENTRY * self.header.sections.len();
        u64_at(self.bytes.as_ref(), at)
    }

    /// The bytes of section `id`, or an error naming the missing section.
    pub fn section(&self, id: u32, name: &str) -> Result<&[u8]> {
        let s = self
            .header
            .sections
            .iter()
            .find(|s| s.id == id)
            .ok_or_else(|| Error::Corrupt {
                path: self.path.clone(),
                what: format!("section {name} is missing"),
            })?;
        Ok(&self.bytes.as_ref()[s.offset as usize..(s.offset + s.len) as usize])
    }

    /// Recompute every section checksum and check that padding is zero.
    /// `name` maps a section id to a name used in messages.
    pub fn verify(&self, name: impl Fn(u32) -> String) -> Result<()> {
        let bytes = self.bytes.as_ref();
        let mut pos = header_len(self.header.sections.len()) as usize;
        let hdr_used = FIXED + ENTRY * self.header.sections.len() + 8;
        if bytes[hdr_used..pos].iter().any(|&b| b != 0) {
            return Err(Error::Corrupt {
                path: self.path.clone(),
                what: "non-zero bytes in header padding".into(),
            });
        }
        for s in &self.header.sections {
            let start = s.offset as usize;
            let stop = (s.offset + s.len) as usize;
            if bytes[pos..start].iter().any(|&b| b != 0) {
                return Err(Error::Corrupt {
                    path: self.path.clone(),
                    what: format!("non-zero bytes in padding before section {}", name(s.id)),
                });
            }
            let got = xxh3_64(&bytes[start..stop]);
            if got != s.checksum {
                return Err(Error::Checksum {
                    path: self.path.clone(),
                    section: name(s.id),
                    expected: s.checksum,
                    got,
                });
            }
            pos = stop;
        }
        if bytes[pos..].iter().any(|&b| b != 0) {
            return Err(Error::Corrupt {
                path: self.path.clone(),
                what: "non-zero bytes after the last section".into(),
            });
        }
        Ok(())
    }
}

/// Read the kind and version of a tamis binary file without checking anything else.
pub fn peek_kind(bytes: &[u8]) -> Option<(Kind, u32)> {
    if bytes.len() < 16 || bytes[..8] != MAGIC {
        return None;
    }
    Kind::from_u32(u32_at(bytes, 8)).map(|k| (k, u32_at(bytes, 12)))
}

/// Read-only bytes of a whole file: a memory map, or an empty vector for an empty
/// file (which cannot be mapped).
pub enum FileBytes {
    /// A read-only memory map of the file.
    Mapped(memmap2::Mmap),
    /// An empty file.
    Empty,
}

impl AsRef<[u8]> for FileBytes {
    fn as_ref(&self) -> &[u8] {
        match self {
            FileBytes::Mapped(m) => m,
            FileBytes::Empty => &[],
        }
    }
}

/// Map a whole file read-only. This is the one place tamis creates a memory map.
///
/// # Safety contract
/// A map is only sound while nobody modifies or truncates the file. tamis never
/// modifies a file after it has been renamed into place (shards, models and
/// checkpoints are write-once; replacing one renames a new file over the name,
/// which leaves existing maps of the old file intact). If another program truncates
/// a mapped file, reading the lost pages raises SIGBUS and the process dies; it
/// cannot corrupt other files. This contract is documented in DEVELOPERS.md.
pub fn map_file(path: &Path) -> Result<FileBytes> {
    let file = File::open(path).at(path)?;
    let len = file.metadata().at(path)?.len();
    if len == 0 {
        return Ok(FileBytes::Empty);
    }
    // SAFETY: see the contract above; the file is opened read-only and tamis never
    // writes to a file after it has been renamed into place.
    let map = unsafe { memmap2::Mmap::map(&file) }.at(path)?;
    Ok(FileBytes::Mapped(map))
}

/// A file being written under a temporary name in its destination folder.
///
/// Dropped without [`AtomicFile::commit`], the temporary file is removed and the
/// destination is left as it was.
pub struct AtomicFile {
    tmp: PathBuf,
    dest: PathBuf,
    file: Option<File>,
}

impl AtomicFile {
    /// Create a temporary file next to `dest`.
    pub fn create(dest: &Path) -> Result<AtomicFile> {
        let dir = parent_dir(dest);
        let name = dest
            .file_name()
            .ok_or_else(|| Error::Invalid(format!("{}: not a file name", dest.display())))?;
        let tmp = dir.join(format!(
            ".{}.tmp-{}",
            name.to_string_lossy(),
            std::process::id()
        ));
        let file = OpenOptions::new()
            .write(true)
            .read(true)
            .create(true)
            .truncate(true)
            .open(&tmp)
            .at(&tmp)?;
        Ok(AtomicFile {
            tmp,
            dest: dest.to_path_buf(),
            file: Some(file),
        })
    }

    /// The open temporary file.
    pub fn file(&mut self) -> &mut File {
        self.file.as_mut().expect("file is open until commit")
    }

    /// The temporary path (for error messages).
    pub fn tmp_path(&self) -> &Path {
        &self.tmp
    }

    /// The final path.
    pub fn dest(&self) -> &Path {
        &self.dest
    }

    /// Sync the data, rename the file into place and sync the folder.
    pub fn commit(mut self) -> Result<()> {
        let file = self.file.take().expect("file is open until commit");
        let placed = file.sync_all().at(&self.tmp).and_then(|()| {
            drop(file);
            std::fs::rename(&self.tmp, &self.dest).at(&self.dest)
        });
        self.remove_tmp_unless(&placed);
        placed?;
        sync_dir(&parent_dir(&self.dest))?;
        Ok(())
    }

    /// After a failed sync or rename, remove the temporary file (as a drop
    /// before commit does): nothing else will.
    fn remove_tmp_unless(&self, placed: &Result<()>) {
        if placed.is_err() {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }

    /// Rename the file into place without syncing it. Only for files that become
    /// reachable later through another file (a shard through the manifest): the
    /// caller syncs them (see [`sync_file`]) before writing that file.
    pub fn commit_unsynced(mut self) -> Result<()> {
        drop(self.file.take());
        let placed = std::fs::rename(&self.tmp, &self.dest).at(&self.dest);
        self.remove_tmp_unless(&placed);
        placed
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if self.file.take().is_some() {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

/// Remove temporary files that an earlier, killed writer of `dest` left behind
/// (`.NAME.tmp-PID` next to it, whose process no longer runs). Best effort:
/// errors are ignored, since the files are unreachable garbage either way.
pub fn remove_stale_temps(dest: &Path) {
    let (dir, Some(name)) = (parent_dir(dest), dest.file_name()) else {
        return;
    };
    let prefix = format!(".{}.tmp-", name.to_string_lossy());
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return;
    };
    for e in entries.flatten() {
        let file = e.file_name();
        let Some(pid) = file.to_str().and_then(|f| f.strip_prefix(&prefix)) else {
            continue;
        };
        let alive = pid
            .parse::<u32>()
            .is_ok_and(|p| p == std::process::id() || Path::new(&format!("/proc/{p}")).exists());
        if !alive {
            let _ = std::fs::remove_file(e.path());
        }
    }
}

/// Whether two paths name the same place, however they are spelt: the same
/// file name in the same folder (symbolic links to folders followed; the file
/// itself need not exist yet).
pub fn same_place(a: &Path, b: &Path) -> bool {
    let place = |p: &Path| {
        let parent = parent_dir(p);
        let parent = std::fs::canonicalize(&parent).unwrap_or(parent);
        (parent, p.file_name().map(|n| n.to_owned()))
    };
    place(a) == place(b)
}

/// The folder holding `path` (`.` for a bare file name).
pub fn parent_dir(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// fsync a folder so that a rename inside it is durable.
pub fn sync_dir(dir: &Path) -> Result<()> {
    File::open(dir).and_then(|d| d.sync_all()).at(dir)
}

/// fsync a file written earlier.
pub fn sync_file(path: &Path) -> Result<()> {
    File::open(path).and_then(|f| f.sync_all()).at(path)
}

/// Write `bytes` to `dest` atomically (temporary file, sync, rename, folder sync).
pub fn write_atomic(dest: &Path, bytes: &[u8]) -> Result<()> {
    let mut f = AtomicFile::create(dest)?;
    let tmp = f.tmp_path().to_path_buf();
    f.file().write_all(bytes).at(&tmp)?;
    f.commit()
}

/// A stream of bytes that counts and checksums what it writes. Small writes are
/// gathered in a buffer so the checksum and the system call see large blocks.
pub struct SectionSink<W: Write> {
    out: W,
    hash: Xxh3,
    len: u64,
    buf: Vec<u8>,
}

/// Buffer size of a [`SectionSink`].
const SINK_BUF: usize = 1 << 18;

impl<W: Write> SectionSink<W> {
    /// Wrap a writer.
    pub fn new(out: W) -> Self {
        SectionSink {
            out,
            hash: Xxh3::new(),
            len: 0,
            buf: Vec::with_capacity(SINK_BUF),
        }
    }

    fn drain(&mut self) -> io::Result<()> {
        if !self.buf.is_empty() {
            self.hash.update(&self.buf);
            self.out.write_all(&self.buf)?;
            self.buf.clear();
        }
        Ok(())
    }

    /// Append bytes.
    #[inline]
    pub fn write(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.len += bytes.len() as u64;
        if self.buf.len() + bytes.len() > SINK_BUF {
            self.drain()?;
            if bytes.len() >= SINK_BUF {
                self.hash.update(bytes);
                return self.out.write_all(bytes);
            }
        }
        self.buf.extend_from_slice(bytes);
        Ok(())
    }

    /// Bytes written so far.
    pub fn len(&self) -> u64 {
        self.len
    }

    /// Whether nothing was written.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Flush and return the writer, the byte count and the checksum.
    pub fn finish(mut self) -> io::Result<(W, u64, u64)> {
        self.drain()?;
        self.out.flush()?;
        Ok((self.out, self.len, self.hash.digest()))
    }
}

/// Builds a container file section by section, streaming each section to disk.
///
/// Sections are written in order after a reserved header; `finish` writes the
/// header and commits the file atomically.
pub struct ContainerWriter {
    file: AtomicFile,
    out: BufWriter<File>,
    pos: u64,
    kind: Kind,
    version: u32,
    params: [u64; 4],
    sections: Vec<SectionEntry>,
    capacity: usize,
}

/// Size of the write buffer used for containers.
const WRITE_BUF: usize = 1 << 18;

impl ContainerWriter {
    /// Start a file at `dest` that will hold at most `max_sections` sections.
    pub fn create(dest: &Path, kind: Kind, version: u32, max_sections: usize) -> Result<Self> {
        let mut file = AtomicFile::create(dest)?;
        let tmp = file.tmp_path().to_path_buf();
        let handle = file.file().try_clone().at(&tmp)?;
        let mut out = BufWriter::with_capacity(WRITE_BUF, handle);
        let hl = header_len(max_sections);
        out.write_all(&vec![0u8; hl as usize]).at(&tmp)?;
        Ok(ContainerWriter {
            file,
            out,
            pos: hl,
            kind,
            version,
            params: [0; 4],
            sections: Vec::new(),
            capacity: max_sections,
        })
    }

    fn pad(&mut self) -> Result<()> {
        let target = align_up(self.pos);
        if target > self.pos {
            let zeros = [0u8; ALIGN as usize];
            self.out
                .write_all(&zeros[..(target - self.pos) as usize])
                .at(self.file.tmp_path())?;
            self.pos = target;
        }
        Ok(())
    }

    fn push_entry(&mut self, id: u32, offset: u64, len: u64, checksum: u64) -> Result<()> {
        if self.sections.len() >= self.capacity {
            return Err(Error::Invalid(format!(
                "internal: more than {} sections",
                self.capacity
            )));
        }
        self.sections.push(SectionEntry {
            id,
            offset,
            len,
            checksum,
        });
        Ok(())
    }

    /// Write a whole section from memory.
    pub fn section(&mut self, id: u32, bytes: &[u8]) -> Result<()> {
        self.pad()?;
        let offset = self.pos;
        self.out.write_all(bytes).at(self.file.tmp_path())?;
        self.pos += bytes.len() as u64;
        self.push_entry(id, offset, bytes.len() as u64, xxh3_64(bytes))
    }

    /// Start a section whose bytes are streamed with [`ContainerWriter::stream`];
    /// close it with [`ContainerWriter::end_stream`].
    pub fn begin_stream(&mut self) -> Result<StreamSection> {
        self.pad()?;
        Ok(StreamSection {
            offset: self.pos,
            hash: Xxh3::new(),
            len: 0,
        })
    }

    /// Append bytes to the open streamed section.
    pub fn stream(&mut self, s: &mut StreamSection, bytes: &[u8]) -> Result<()> {
        s.hash.update(bytes);
        s.len += bytes.len() as u64;
        self.pos += bytes.len() as u64;
        self.out.write_all(bytes).at(self.file.tmp_path())
    }

    /// Close a streamed section under `id`.
    pub fn end_stream(&mut self, id: u32, s: StreamSection) -> Result<()> {
        self.push_entry(id, s.offset, s.len, s.hash.digest())
    }

    /// Copy a section from a side file written with a [`SectionSink`]; the length
    /// and checksum recorded while writing it are used, and the copy is checked
    /// against the length.
    pub fn section_from_file(
        &mut self,
        id: u32,
        src: &mut File,
        src_path: &Path,
        len: u64,
        checksum: u64,
    ) -> Result<()> {
        self.pad()?;
        self.out.flush().at(self.file.tmp_path())?;
        let offset = self.pos;
        src.seek(SeekFrom::Start(0)).at(src_path)?;
        let copied = io::copy(&mut src.take(len), self.out.get_mut()).at(self.file.tmp_path())?;
        if copied != len {
            return Err(Error::Size {
                path: src_path.to_path_buf(),
                what: "temporary section file".into(),
                expected: len,
                got: copied,
            });
        }
        self.pos += len;
        self.push_entry(id, offset, len, checksum)
    }

    /// Set the kind-specific header parameters.
    pub fn set_params(&mut self, params: [u64; 4]) {
        self.params = params;
    }

    /// Write the header and commit the file under its final name.
    pub fn finish(mut self) -> Result<()> {
        let tmp = self.file.tmp_path().to_path_buf();
        self.out.flush().at(&tmp)?;
        let mut sections = self.sections.clone();
        // Header space was reserved for `capacity` sections; pad the table with
        // nothing: a shorter table is written and the gap up to the first section
        // must be zero, which it is.
        let header = Header {
            kind: self.kind,
            version: self.version,
            file_len: self.pos,
            params: self.params,
            sections: std::mem::take(&mut sections),
        };
        let bytes = header.to_bytes();
        let f = self.out.get_mut();
        f.seek(SeekFrom::Start(0)).at(&tmp)?;
        f.write_all(&bytes).at(&tmp)?;
        // A table shorter than reserved leaves zeros up to the first section; make
        // sure the reserved region beyond the written header is zero.
        let reserved = header_len(self.capacity);
        if (bytes.len() as u64) < reserved {
            f.write_all(&vec![0u8; (reserved - bytes.len() as u64) as usize])
                .at(&tmp)?;
        }
        f.set_len(self.pos).at(&tmp)?;
        drop(self.out);
        self.file.commit()
    }
}

/// An open streamed section of a [`ContainerWriter`].
pub struct StreamSection {
    offset: u64,
    hash: Xxh3,
    len: u64,
}

/// A byte buffer aligned to 8 bytes, for parsing containers held in memory
/// (a `Vec<u8>` carries no alignment guarantee for the `u64` sections).
#[derive(Clone, Debug)]
pub struct AlignedBytes {
    words: Vec<u64>,
    len: usize,
}

impl AlignedBytes {
    /// Copy `bytes` into an aligned buffer.
    pub fn from_slice(bytes: &[u8]) -> Self {
        let mut words = vec![0u64; bytes.len().div_ceil(8)];
        bytemuck::cast_slice_mut::<u64, u8>(&mut words)[..bytes.len()].copy_from_slice(bytes);
        AlignedBytes {
            words,
            len: bytes.len(),
        }
    }

    /// Read a whole file into an aligned buffer.
    pub fn read(path: &Path) -> Result<Self> {
        let bytes = std::fs::read(path).at(path)?;
        Ok(Self::from_slice(&bytes))
    }
}

impl AsRef<[u8]> for AlignedBytes {
    fn as_ref(&self) -> &[u8] {
        &bytemuck::cast_slice::<u64, u8>(&self.words)[..self.len]
    }
}

/// View bytes as a slice of `T`, or explain why not (length or alignment).
pub fn cast_section<'a, T: bytemuck::Pod>(
    bytes: &'a [u8],
    path: &Path,
    name: &str,
) -> Result<&'a [T]> {
    bytemuck::try_cast_slice(bytes).map_err(|e| Error::Corrupt {
        path: path.to_path_buf(),
        what: format!(
            "section {name} cannot be viewed as {}: {e:?}",
            std::any::type_name::<T>()
        ),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(dir: &Path) -> PathBuf {
        let path = dir.join("x.bin");
        let mut w = ContainerWriter::create(&path, Kind::DocFreq, 1, 3).unwrap();
        w.section(1, b"hello").unwrap();
        let mut s = w.begin_stream().unwrap();
        w.stream(&mut s, b"wor").unwrap();
        w.stream(&mut s, b"ld").unwrap();
        w.end_stream(2, s).unwrap();
        w.set_params([7, 8, 9, 10]);
        w.finish().unwrap();
        path
    }

    #[test]
    fn round_trip_and_verify() {
        let dir = tempfile::tempdir().unwrap();
        let path = sample(dir.path());
        let bytes = AlignedBytes::read(&path).unwrap();
        let c = Container::parse(bytes, &path, Kind::DocFreq, 1..=1).unwrap();
        assert_eq!(c.header().params, [7, 8, 9, 10]);
        assert_eq!(c.section(1, "a").unwrap(), b"hello");
        assert_eq!(c.section(2, "b").unwrap(), b"world");
        c.verify(|id| id.to_string()).unwrap();
        assert!(matches!(c.section(3, "c"), Err(Error::Corrupt { .. })));
    }

    #[test]
    fn every_flipped_byte_is_caught() {
        let dir = tempfile::tempdir().unwrap();
        let path = sample(dir.path());
        let good = std::fs::read(&path).unwrap();
        for i in 0..good.len() {
            let mut bad = good.clone();
            bad[i] ^= 0x10;
            let r = Container::parse(AlignedBytes::from_slice(&bad), &path, Kind::DocFreq, 1..=1)
                .and_then(|c| c.verify(|id| id.to_string()));
            assert!(r.is_err(), "flip at byte {i} not caught");
        }
    }

    #[test]
    fn wrong_kind_version_and_truncation() {
        let dir = tempfile::tempdir().unwrap();
        let path = sample(dir.path());
        let good = std::fs::read(&path).unwrap();
        let e = Container::parse(AlignedBytes::from_slice(&good), &path, Kind::Shard, 1..=1)
            .unwrap_err();
        assert!(matches!(e, Error::Corrupt { .. }), "{e}");
        let e = Container::parse(AlignedBytes::from_slice(&good), &path, Kind::DocFreq, 2..=3)
            .unwrap_err();
        assert!(matches!(e, Error::Version { got: 1, .. }), "{e}");
        let e = Container::parse(
            AlignedBytes::from_slice(&good[..good.len() - 1]),
            &path,
            Kind::DocFreq,
            1..=1,
        )
        .unwrap_err();
        assert!(matches!(e, Error::Size { .. }), "{e}");
        let e = Container::parse(
            AlignedBytes::from_slice(&good[..20]),
            &path,
            Kind::DocFreq,
            1..=1,
        )
        .unwrap_err();
        assert!(matches!(e, Error::Size { .. }), "{e}");
        let e = Container::parse(
            AlignedBytes::from_slice(b"PK\x03\x04"),
            &path,
            Kind::DocFreq,
            1..=1,
        )
        .unwrap_err();
        assert!(matches!(e, Error::BadMagic { .. }), "{e}");
    }

    #[test]
    fn uncommitted_file_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let dest = dir.path().join("m.bin");
        std::fs::write(&dest, b"old").unwrap();
        {
            let mut f = AtomicFile::create(&dest).unwrap();
            f.file().write_all(b"new").unwrap();
        }
        assert_eq!(std::fs::read(&dest).unwrap(), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    /// A commit whose rename fails (the destination is a folder) removes its
    /// temporary file, as a dropped one does.
    #[test]
    fn failed_commit_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let dest = dir.path().join("m.bin");
        std::fs::create_dir(&dest).unwrap();
        for synced in [true, false] {
            let mut f = AtomicFile::create(&dest).unwrap();
            f.file().write_all(b"new").unwrap();
            let e = if synced {
                f.commit()
            } else {
                f.commit_unsynced()
            };
            assert!(e.unwrap_err().to_string().contains("m.bin"));
            let names: Vec<_> = std::fs::read_dir(dir.path())
                .unwrap()
                .map(|e| e.unwrap().file_name())
                .collect();
            assert_eq!(names, ["m.bin"], "synced {synced}");
        }
    }
}
