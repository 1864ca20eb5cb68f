//! Input: byte sources, decompression, record boundaries and field extraction.
//!
//! A source is a file or standard input (`-`). Compression is recognised by the
//! first bytes (gzip `1f 8b`, zstd `28 b5 2f fd` or a skippable frame), never
//! by the file name. A [`ChunkReader`] cuts the decompressed stream into chunks of about
//! [`CHUNK_BYTES`] that end on a record boundary, numbering lines as it goes, so
//! chunks can be parsed on any thread and the results put back in input order.
//! [`parse`] turns a chunk into records or counted bad lines.

pub mod parse;
pub mod pipeline;

use std::fs::File;
use std::io::{self, BufReader, Read};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use serde::{Deserialize, Serialize};
use xxhash_rust::xxh3::xxh3_64;

use crate::error::{Error, IoContext, Result};

pub use parse::{parse_chunk, BadLine, BadReason, Fields, LabelMode, ParseScratch};

/// Target size of a chunk handed to a worker.
pub const CHUNK_BYTES: usize = 1 << 20;
/// Bytes hashed at each end of an input for its fingerprint.
pub const FINGERPRINT_BYTES: usize = 1 << 20;

/// Record formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    /// `label<TAB>text`, one record per line.
    Tsv,
    /// RFC 4180 CSV with a header row.
    Csv,
    /// One JSON object per line.
    Jsonl,
}

/// How records are turned into fields.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct InputSpec {
    /// Record format.
    pub format: Format,
    /// CSV column or JSON field holding the label (unused for TSV).
    pub label: String,
    /// CSV columns or JSON fields holding text (TSV: the single field `text`).
    pub text: Vec<String>,
    /// CSV columns or JSON fields holding numbers.
    pub numeric: Vec<String>,
    /// Records longer than this are skipped and counted.
    pub max_line_bytes: usize,
}

impl InputSpec {
    /// The specification for TSV input.
    pub fn tsv(max_line_bytes: usize) -> Self {
        InputSpec {
            format: Format::Tsv,
            label: String::new(),
            text: vec!["text".into()],
            numeric: vec![],
            max_line_bytes,
        }
    }
}

/// Compression of a source.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Compression {
    /// Plain bytes.
    None,
    /// gzip (one or more members).
    Gzip,
    /// Zstandard (one or more frames).
    Zstd,
}

/// Recognise compression from the first bytes of a stream. A Zstandard stream
/// may begin with a skippable frame (magic `0x184D2A50`..=`0x184D2A5F`, RFC 8878
/// §3.1.2) instead of a compressed one; the decoder skips it.
pub fn detect(head: &[u8]) -> Compression {
    let skippable = head.len() >= 4 && head[0] & 0xf0 == 0x50 && head[1..4] == [0x2a, 0x4d, 0x18];
    if head.starts_with(&[0x1f, 0x8b]) {
        Compression::Gzip
    } else if head.starts_with(&[0x28, 0xb5, 0x2f, 0xfd]) || skippable {
        Compression::Zstd
    } else {
        Compression::None
    }
}

/// Identity of an input, recorded in the manifest: path, size and hashes of its
/// first and last MiB (of the raw, possibly compressed, bytes).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Fingerprint {
    /// Path as given (`-` for standard input).
    pub path: String,
    /// Raw bytes read.
    pub size: u64,
    /// xxh3-64 of the first MiB, hex.
    pub head_xxh3: String,
    /// xxh3-64 of the last MiB, hex.
    pub tail_xxh3: String,
    /// Compression found.
    pub compression: Compression,
}

/// Watches the raw bytes of a source: counts them (also into a shared progress
/// counter) and keeps the first and last MiB for the fingerprint.
struct Watch {
    size: u64,
    head: Vec<u8>,
    ring: Vec<u8>,
    ring_pos: usize,
}

impl Watch {
    fn new() -> Self {
        Watch {
            size: 0,
            head: Vec::new(),
            ring: Vec::new(),
            ring_pos: 0,
        }
    }

    fn see(&mut self, mut b: &[u8]) {
        self.size += b.len() as u64;
        if self.head.len() < FINGERPRINT_BYTES {
            let take = (FINGERPRINT_BYTES - self.head.len()).min(b.len());
            self.head.extend_from_slice(&b[..take]);
        }
        if b.len() > FINGERPRINT_BYTES {
            b = &b[b.len() - FINGERPRINT_BYTES..];
        }
        while !b.is_empty() {
            if self.ring.len() < FINGERPRINT_BYTES {
                let take = (FINGERPRINT_BYTES - self.ring.len()).min(b.len());
                self.ring.extend_from_slice(&b[..take]);
                b = &b[take..];
                continue;
            }
            let take = (FINGERPRINT_BYTES - self.ring_pos).min(b.len());
            self.ring[self.ring_pos..self.ring_pos + take].copy_from_slice(&b[..take]);
            self.ring_pos = (self.ring_pos + take) % FINGERPRINT_BYTES;
            b = &b[take..];
        }
    }

    fn tail(&self) -> Vec<u8> {
        let mut t = self.ring[self.ring_pos..].to_vec();
        t.extend_from_slice(&self.ring[..self.ring_pos]);
        t
    }
}

struct Watched<R> {
    inner: R,
    watch: Arc<Mutex<Watch>>,
    progress: Arc<AtomicU64>,
}

impl<R: Read> Read for Watched<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        if n > 0 {
            self.watch.lock().expect("not poisoned").see(&buf[..n]);
            self.progress.fetch_add(n as u64, Ordering::Relaxed);
        }
        Ok(n)
    }
}

/// A decoder whose errors say which compressed format failed: "unexpected end
/// of file" alone does not tell the user that their gzip file is damaged.
struct Decoding<R> {
    inner: R,
    format: &'static str,
}

impl<R: Read> Read for Decoding<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        self.inner.read(buf).map_err(|e| {
            if e.kind() == io::ErrorKind::Interrupted {
                return e;
            }
            io::Error::new(
                e.kind(),
                format!(
                    "the {} stream is damaged, truncated or followed by other bytes ({e})",
                    self.format
                ),
            )
        })
    }
}

/// An opened source: decompressed bytes plus what is needed for its fingerprint.
pub struct Source {
    /// Name for messages (the path, or `stdin`).
    pub name: String,
    /// Path as given.
    pub path: String,
    /// Decompressed bytes.
    pub reader: Box<dyn Read + Send>,
    /// Compression found.
    pub compression: Compression,
    watch: Arc<Mutex<Watch>>,
}

impl Source {
    /// Open `path` (`-` for standard input), detect compression and wrap it in a
    /// decoder. Raw bytes read are added to `progress`.
    pub fn open(path: &str, progress: Arc<AtomicU64>) -> Result<Source> {
        let (raw, name): (Box<dyn Read + Send>, String) = if path == "-" {
            (Box::new(io::stdin()), "stdin".into())
        } else {
            let f = File::open(path).at(path)?;
            if f.metadata().at(path)?.is_dir() {
                return Err(Error::Invalid(format!("{path}: is a folder, not a file")));
            }
            (Box::new(f), path.to_string())
        };
        let watch = Arc::new(Mutex::new(Watch::new()));
        let watched = Watched {
            inner: raw,
            watch: watch.clone(),
            progress,
        };
        let mut br = BufReader::with_capacity(1 << 16, watched);
        let head = io::BufRead::fill_buf(&mut br).at(PathBuf::from(&name))?;
        let compression = detect(head);
        let reader: Box<dyn Read + Send> = match compression {
            Compression::None => Box::new(br),
            Compression::Gzip => Box::new(Decoding {
                inner: flate2::bufread::MultiGzDecoder::new(br),
                format: "gzip",
            }),
            Compression::Zstd => Box::new(Decoding {
                inner: zstd::stream::read::Decoder::with_buffer(br).at(PathBuf::from(&name))?,
                format: "zstd",
            }),
        };
        Ok(Source {
            name,
            path: path.to_string(),
            reader,
            compression,
            watch,
        })
    }

    /// The fingerprint of everything read so far (call after the end).
    pub fn fingerprint(&self) -> Fingerprint {
        fingerprint_of(&self.path, &self.watch, self.compression)
    }
}

fn fingerprint_of(path: &str, watch: &Mutex<Watch>, compression: Compression) -> Fingerprint {
    let w = watch.lock().expect("not poisoned");
    Fingerprint {
        path: path.to_string(),
        size: w.size,
        head_xxh3: format!("{:016x}", xxh3_64(&w.head)),
        tail_xxh3: format!("{:016x}", xxh3_64(&w.tail())),
        compression,
    }
}

/// Size of a file on disk, if `path` is a regular file (for progress totals).
pub fn file_size(path: &str) -> Option<u64> {
    if path == "-" {
        return None;
    }
    std::fs::metadata(Path::new(path))
        .ok()
        .filter(|m| m.is_file())
        .map(|m| m.len())
}

/// A piece of one input that ends on a record boundary.
#[derive(Debug, Clone)]
pub struct Chunk {
    /// Index of the input among all inputs.
    pub input: usize,
    /// Sequence number across all inputs (chunks are numbered in read order).
    pub seq: u64,
    /// Line number (1-based) of the first byte of `data`.
    pub first_line: u64,
    /// Bytes of whole records (the last may lack its newline at the end of input).
    pub data: Vec<u8>,
    /// Set when this chunk stands for a record the reader had to skip because it
    /// grew beyond `--max-line-bytes` (data is empty then).
    pub skipped: Option<BadReason>,
    /// For CSV: column positions of the wanted fields, from the input's header.
    pub columns: Option<Arc<parse::Columns>>,
}

/// Cuts a decompressed stream into [`Chunk`]s.
pub struct ChunkReader {
    src: Source,
    input: usize,
    spec: InputSpec,
    carry: Vec<u8>,
    eof: bool,
    line: u64,
    columns: Option<Arc<parse::Columns>>,
    target: usize,
    label_required: bool,
    /// A used chunk buffer to fill next instead of a new allocation.
    spare: Option<Vec<u8>>,
}

impl ChunkReader {
    /// Start reading `src`, input number `input`. For CSV the header record is
    /// read here and the wanted columns looked up (a missing column is an error;
    /// a missing label column only when labels are required).
    pub fn new(src: Source, input: usize, spec: &InputSpec, mode: LabelMode) -> Result<Self> {
        Self::with_target(src, input, spec, mode, CHUNK_BYTES)
    }

    /// As [`ChunkReader::new`] with a chosen chunk size (tests use small ones).
    pub fn with_target(
        src: Source,
        input: usize,
        spec: &InputSpec,
        mode: LabelMode,
        target: usize,
    ) -> Result<Self> {
        let mut r = ChunkReader {
            src,
            input,
            spec: spec.clone(),
            carry: Vec::new(),
            eof: false,
            line: 1,
            columns: None,
            target: target.max(1),
            label_required: mode == LabelMode::Required,
            spare: None,
        };
        r.skip_bom()?;
        if spec.format == Format::Csv {
            r.read_csv_header()?;
        }
        Ok(r)
    }

    /// The source being read (for its fingerprint once done).
    pub fn source(&self) -> &Source {
        &self.src
    }

    fn path(&self) -> PathBuf {
        PathBuf::from(&self.src.name)
    }

    /// Read until `carry` holds at least `want` bytes or the input ends.
    fn fill(&mut self, want: usize) -> Result<()> {
        while self.carry.len() < want && !self.eof {
            let old = self.carry.len();
            let step = (want - old).clamp(1, 1 << 18);
            self.carry.resize(old + step, 0);
            let r = self.src.reader.read(&mut self.carry[old..]);
            let n = *r.as_ref().unwrap_or(&0);
            self.carry.truncate(old + n);
            match r {
                Ok(0) => self.eof = true,
                Ok(_) => {}
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => {
                    return Err(Error::Io {
                        path: self.path(),
                        cause: e,
                    })
                }
            }
        }
        Ok(())
    }

    /// Drop a UTF-8 byte-order mark at the start of the stream.
    fn skip_bom(&mut self) -> Result<()> {
        self.fill(3)?;
        if self.carry.starts_with(b"\xEF\xBB\xBF") {
            self.carry.drain(..3);
        }
        Ok(())
    }

    /// End (exclusive) of the last complete record within `buf`, if any, and
    /// whether `buf` ends inside a quoted CSV field.
    fn last_boundary(&self, buf: &[u8]) -> (Option<usize>, bool) {
        if self.spec.format != Format::Csv {
            return (memchr::memrchr(b'\n', buf).map(|p| p + 1), false);
        }
        csv_boundaries(buf, false)
    }

    fn read_csv_header(&mut self) -> Result<()> {
        let limit = self.spec.max_line_bytes.max(1);
        let mut want = self.target.min(limit + 1);
        loop {
            self.fill(want)?;
            let (end, quoted) = self.first_csv_boundary();
            let end = match end {
                Some(e) => e,
                None if self.eof && !self.carry.is_empty() && !quoted => self.carry.len(),
                None if self.eof => {
                    return Err(Error::Invalid(format!(
                        "{}: no CSV header row (the input is empty or its header is unterminated)",
                        self.src.name
                    )))
                }
                None if self.carry.len() > limit => {
                    return Err(Error::Invalid(format!(
                        "{}: CSV header row longer than --max-line-bytes {}",
                        self.src.name, self.spec.max_line_bytes
                    )))
                }
                None => {
                    want = (want * 2).min(limit + 1);
                    continue;
                }
            };
            let header: Vec<u8> = self.carry.drain(..end).collect();
            self.line += memchr::memchr_iter(b'\n', &header).count() as u64;
            self.columns = Some(Arc::new(parse::Columns::from_header_mode(
                &header,
                &self.spec,
                &self.src.name,
                self.label_required,
            )?));
            return Ok(());
        }
    }

    fn first_csv_boundary(&self) -> (Option<usize>, bool) {
        csv_boundaries(&self.carry, true)
    }

    /// The next chunk, or `None` at the end of the input. `seq` is the sequence
    /// number to give it.
    pub fn next_chunk(&mut self, seq: u64) -> Result<Option<Chunk>> {
        let limit = self.spec.max_line_bytes.max(1);
        let mut want = self.target;
        loop {
            self.fill(want)?;
            if self.carry.is_empty() && self.eof {
                return Ok(None);
            }
            let (end, quoted) = self.last_boundary(&self.carry);
            let cut = match (self.eof, end) {
                // At the end of the input the rest is a last record without a
                // newline, unless it is an unterminated quoted CSV field.
                (true, _) if !quoted => self.carry.len(),
                (_, Some(e)) => e,
                (false, None) if self.carry.len() <= limit => {
                    // One record longer than the target: read more of it.
                    want = (self.carry.len() * 2).max(self.target).min(limit + 1);
                    continue;
                }
                _ => return self.skip_record(seq, quoted).map(Some),
            };
            let rest = &self.carry[cut..];
            let mut next = match self.spare.take() {
                Some(mut v) => {
                    v.clear();
                    v
                }
                None => Vec::new(),
            };
            next.reserve(self.target + (1 << 16));
            next.extend_from_slice(rest);
            let mut data = std::mem::replace(&mut self.carry, next);
            data.truncate(cut);
            let chunk = Chunk {
                input: self.input,
                seq,
                first_line: self.line,
                skipped: None,
                columns: self.columns.clone(),
                data,
            };
            self.line += memchr::memchr_iter(b'\n', &chunk.data).count() as u64;
            return Ok(Some(chunk));
        }
    }

    /// Give a used chunk buffer back, to be filled again.
    pub fn recycle(&mut self, buf: Vec<u8>) {
        self.spare = Some(buf);
    }

    /// Skip one record that outgrew the limit (or an unterminated quoted field at
    /// the end of the input): drop bytes up to the next newline.
    fn skip_record(&mut self, seq: u64, quoted: bool) -> Result<Chunk> {
        let first_line = self.line;
        let reason = if quoted {
            BadReason::BadCsv
        } else {
            BadReason::TooLong
        };
        loop {
            if let Some(p) = memchr::memchr(b'\n', &self.carry) {
                self.carry.drain(..=p);
                break;
            }
            self.carry.clear();
            if self.eof {
                break;
            }
            self.fill(self.target)?;
        }
        // Lines inside the skipped record are lost to numbering only for the
        // rare quoted-field case; a plain long line is exactly one line.
        self.line += 1;
        Ok(Chunk {
            input: self.input,
            seq,
            first_line,
            data: Vec::new(),
            skipped: Some(reason),
            columns: self.columns.clone(),
        })
    }
}

/// Record boundaries of CSV bytes that start at a record boundary: the end
/// (exclusive) of the last complete record (or of the first, with `first`), and
/// whether the bytes end inside a quoted field.
///
/// A quote opens a quoted field only at the start of a field (RFC 4180, 2.5); a
/// stray quote inside an unquoted field is literal, so it cannot shift the
/// boundaries of the records after it.
fn csv_boundaries(buf: &[u8], first: bool) -> (Option<usize>, bool) {
    #[derive(PartialEq)]
    enum St {
        FieldStart,
        Unquoted,
        Quoted,
        QuoteInQuoted,
    }
    let mut st = St::FieldStart;
    let mut last = None;
    let mut pos = 0;
    for p in memchr::memchr3_iter(b'"', b',', b'\n', buf) {
        if p > pos {
            // Ordinary bytes between the special ones.
            st = match st {
                St::FieldStart | St::QuoteInQuoted => St::Unquoted,
                other => other,
            };
        }
        pos = p + 1;
        st = match (st, buf[p]) {
            (St::Quoted, b'"') => St::QuoteInQuoted,
            (St::Quoted, _) => St::Quoted,
            (St::QuoteInQuoted, b'"') => St::Quoted,
            (St::FieldStart, b'"') => St::Quoted,
            (St::Unquoted, b'"') => St::Unquoted,
            (_, b',') => St::FieldStart,
            (_, _) => {
                // A newline outside quotes ends a record.
                last = Some(p + 1);
                if first {
                    return (last, false);
                }
                St::FieldStart
            }
        };
    }
    (last, st == St::Quoted)
}

/// A message from [`read_inputs`].
pub enum ReadMsg {
    /// The next chunk, in input order.
    Chunk(Chunk),
    /// Input number `.0` is done; its fingerprint.
    Done(usize, Fingerprint),
    /// Reading failed; nothing more follows.
    Failed(Error),
}

/// Read `inputs` in order and send their chunks (numbered across inputs) to
/// `tx`; meant to run on a thread of its own. Stops quietly when the receiver
/// hangs up.
pub fn read_inputs(
    inputs: &[String],
    spec: &InputSpec,
    mode: LabelMode,
    progress: Arc<AtomicU64>,
    tx: std::sync::mpsc::SyncSender<ReadMsg>,
) {
    read_inputs_recycling(inputs, spec, mode, progress, tx, None)
}

/// [`read_inputs`] that fills the chunk buffers sent back on `spare` again
/// rather than allocating new ones.
pub fn read_inputs_recycling(
    inputs: &[String],
    spec: &InputSpec,
    mode: LabelMode,
    progress: Arc<AtomicU64>,
    tx: std::sync::mpsc::SyncSender<ReadMsg>,
    spare: Option<std::sync::mpsc::Receiver<Vec<u8>>>,
) {
    let mut seq = 0u64;
    for (i, path) in inputs.iter().enumerate() {
        let mut run = || -> Result<Option<Fingerprint>> {
            let src = Source::open(path, progress.clone())?;
            let mut r = ChunkReader::new(src, i, spec, mode)?;
            loop {
                if let Some(buf) = spare.as_ref().and_then(|s| s.try_recv().ok()) {
                    r.recycle(buf);
                }
                let Some(c) = r.next_chunk(seq)? else {
                    break;
                };
                seq += 1;
                if tx.send(ReadMsg::Chunk(c)).is_err() {
                    return Ok(None);
                }
            }
            Ok(Some(r.source().fingerprint()))
        };
        match run() {
            Ok(Some(fp)) => {
                if tx.send(ReadMsg::Done(i, fp)).is_err() {
                    return;
                }
            }
            Ok(None) => return,
            Err(e) => {
                let _ = tx.send(ReadMsg::Failed(e));
                return;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn source_of(bytes: &[u8], dir: &Path, name: &str) -> Source {
        let p = dir.join(name);
        std::fs::write(&p, bytes).unwrap();
        Source::open(p.to_str().unwrap(), Arc::new(AtomicU64::new(0))).unwrap()
    }

    fn chunks(src: Source, spec: &InputSpec, target: usize) -> Vec<Chunk> {
        let mut r = ChunkReader::with_target(src, 0, spec, LabelMode::Required, target).unwrap();
        let mut out = Vec::new();
        let mut seq = 0;
        while let Some(c) = r.next_chunk(seq).unwrap() {
            out.push(c);
            seq += 1;
        }
        out
    }

    #[test]
    fn detects_compression_by_magic() {
        let dir = tempfile::tempdir().unwrap();
        let text = b"a\tone two\nb\tthree\n".repeat(50);
        let mut gz = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        gz.write_all(&text).unwrap();
        let gz = gz.finish().unwrap();
        let zs = zstd::encode_all(&text[..], 3).unwrap();
        // A skippable frame first (RFC 8878 §3.1.2: magic 0x184D2A50 to
        // 0x184D2A5F, little-endian, then a 4-byte little-endian size and that
        // many bytes of user data), as some writers put metadata there.
        let mut skip = vec![0x5e, 0x2a, 0x4d, 0x18, 5, 0, 0, 0];
        skip.extend_from_slice(b"notes");
        skip.extend_from_slice(&zs);
        // Names lie on purpose: detection must not use them.
        for (bytes, name, want) in [
            (&text[..], "a.gz", Compression::None),
            (&gz[..], "b.txt", Compression::Gzip),
            (&zs[..], "c.tsv", Compression::Zstd),
            (&skip[..], "d.tsv", Compression::Zstd),
        ] {
            let mut s = source_of(bytes, dir.path(), name);
            assert_eq!(s.compression, want);
            let mut out = Vec::new();
            s.reader.read_to_end(&mut out).unwrap();
            assert_eq!(out, text);
            let fp = s.fingerprint();
            assert_eq!(fp.size, bytes.len() as u64);
            assert_eq!(fp.head_xxh3, format!("{:016x}", xxh3_64(bytes)));
            assert_eq!(fp.tail_xxh3, fp.head_xxh3);
        }
    }

    #[test]
    fn concatenated_gzip_members_are_read() {
        let dir = tempfile::tempdir().unwrap();
        let mut all = Vec::new();
        for part in [b"x\ta\n", b"y\tb\n"] {
            let mut gz = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
            gz.write_all(part).unwrap();
            all.extend(gz.finish().unwrap());
        }
        let mut s = source_of(&all, dir.path(), "m");
        let mut out = Vec::new();
        s.reader.read_to_end(&mut out).unwrap();
        assert_eq!(out, b"x\ta\ny\tb\n");
    }

    #[test]
    fn fingerprint_tail_is_last_mib() {
        let mut w = Watch::new();
        let data: Vec<u8> = (0..(3 * FINGERPRINT_BYTES + 123))
            .map(|i| (i * 7) as u8)
            .collect();
        for piece in data.chunks(100_003) {
            w.see(piece);
        }
        assert_eq!(w.size, data.len() as u64);
        assert_eq!(w.head, &data[..FINGERPRINT_BYTES]);
        assert_eq!(w.tail(), &data[data.len() - FINGERPRINT_BYTES..]);
    }

    #[test]
    fn chunks_end_on_lines_and_number_them() {
        let dir = tempfile::tempdir().unwrap();
        let text: Vec<u8> = (0..200)
            .flat_map(|i| format!("l\tline {i}\n").into_bytes())
            .chain(b"l\tlast without newline".iter().copied())
            .collect();
        let spec = InputSpec::tsv(1 << 20);
        let cs = chunks(source_of(&text, dir.path(), "t"), &spec, 100);
        assert!(cs.len() > 10);
        let joined: Vec<u8> = cs.iter().flat_map(|c| c.data.clone()).collect();
        assert_eq!(joined, text);
        let mut line = 1;
        for c in &cs {
            assert_eq!(c.first_line, line);
            assert!(c.data.ends_with(b"\n") || c.data.ends_with(b"newline"));
            line += c.data.iter().filter(|&&b| b == b'\n').count() as u64;
        }
    }

    #[test]
    fn overlong_line_is_skipped_and_numbered() {
        let dir = tempfile::tempdir().unwrap();
        let mut text = b"a\tshort\n".to_vec();
        text.extend(std::iter::repeat_n(b'x', 5000));
        text.extend(b"\nb\tafter\n");
        let spec = InputSpec::tsv(1000);
        let cs = chunks(source_of(&text, dir.path(), "t"), &spec, 64);
        let skipped: Vec<&Chunk> = cs.iter().filter(|c| c.skipped.is_some()).collect();
        assert_eq!(skipped.len(), 1);
        assert_eq!(skipped[0].first_line, 2);
        assert_eq!(skipped[0].skipped, Some(BadReason::TooLong));
        let after = cs.iter().find(|c| c.data.starts_with(b"b\t")).unwrap();
        assert_eq!(after.first_line, 3);
    }

    #[test]
    fn csv_chunks_respect_quoted_newlines() {
        let dir = tempfile::tempdir().unwrap();
        let mut text = b"label,text\n".to_vec();
        for i in 0..100 {
            text.extend(format!("spam,\"line {i}\nstill \"\"quoted\"\", here\"\n").bytes());
        }
        let spec = InputSpec {
            format: Format::Csv,
            label: "label".into(),
            text: vec!["text".into()],
            numeric: vec![],
            max_line_bytes: 1 << 20,
        };
        let cs = chunks(source_of(&text, dir.path(), "c"), &spec, 50);
        for c in &cs {
            assert!(c.data.starts_with(b"spam,\""), "chunk cut inside a record");
        }
        // Each record spans two lines; the header is line 1.
        let mut records = 0;
        for c in &cs {
            assert_eq!(c.first_line, 2 + 2 * records);
            records += memchr::memmem::find_iter(&c.data, b"spam,\"").count() as u64;
        }
        assert_eq!(records, 100);
    }
}
