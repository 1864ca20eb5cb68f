//! The token sketch: the most frequent word tokens of each text field, with
//! their hashes (hence buckets and signs), kept so that hashed models can still
//! be read in words (`tamis inspect`).
//!
//! # Counting
//!
//! The stream of a field is the sequence of (row, distinct word token) pairs:
//! a token counts at most once per row, so a count reads "seen in N rows".
//! Only word unigrams are kept (after masking, so `#` and `@email` appear as
//! tokens); word n-grams and character n-grams are not, which is why
//! `inspect` shows some heavy buckets by id only.
//!
//! The summary is Space-Saving (Metwally, Agrawal, El Abbadi 2005): at most
//! `capacity` entries per field, each with a `count` that never underestimates
//! the token's rows and an `error` such that `count − error` never
//! overestimates them. Unlisted tokens are bounded by the field's `floor`.
//!
//! Ingest builds it in two steps whose result does not depend on the thread
//! count:
//!
//! 1. **Per chunk** (in the workers): exact counts of the chunk's tokens
//!    ([`ChunkCounter`]; memory bounded by the chunk's size), then the
//!    `capacity` largest kept, `floor` = the largest count dropped.
//! 2. **In input order** (on the thread that writes the rows): each chunk
//!    summary is merged into the running one ([`FieldSketch::merge`], the
//!    Space-Saving merge of
//!    Cafaro, Pulimeno and Tempesta 2016, after the mergeable summaries of
//!    Agarwal et al. 2012): for every token of either summary, `count = c₁ + c₂`
//!    and `error = e₁ + e₂`, where a token missing from a summary takes that
//!    summary's floor for both; then the `capacity` largest counts are kept
//!    (ties broken by hash) and the new floor is the largest count dropped, or
//!    `floor₁ + floor₂` when nothing was dropped.
//!
//! Guarantees (proved here because the merge sequence is ours): with `N` the
//! stream length and `k` the capacity, (a) `count − error ≤ f ≤ count` for every
//! listed token of true frequency `f`; (b) `f ≤ floor` for every unlisted
//! token; (c) `floor ≤ N/k` and `error ≤ floor`. Proof of (c): every union
//! count is at least `m₁ + m₂` (the floors), so the kept minimum `M ≥ m₁ + m₂
//! ≥ error`; and the kept counts sum to at most `N₁ + N₂`, because among the
//! kept tokens those missing from a full summary `Sᵢ` (of `k` entries, each at
//! least `mᵢ`) are no more than the entries of `Sᵢ` not kept, so `k·M ≤ N`.
//! With one row per chunk the merge is a close variant of the classic
//! Space-Saving update: a new token enters with count `floor + 1` and error
//! `floor`, and the smallest count is dropped; the floor (the largest count
//! ever dropped) can lag behind the smallest kept count, so a new token may be
//! the one dropped, which only tightens the overestimate.
//!
//! # Privacy
//!
//! Only tokens whose guaranteed count `count − error` reaches `min_count`
//! (`--sketch-min-count`, default 20) are written; the floor is raised to the
//! largest count dropped, so the bounds above still hold for what is written.
//!
//! # File (`sketch-NNNNNN.tmk`, one per ingest batch)
//!
//! A [`crate::container`] of kind 5, version [`VERSION`]. Parameters: text
//! fields, capacity, min count, batch. One section (id 1) holding the sketch
//! as laid out by [`TokenSketch::to_bytes`] (the same bytes form the optional
//! `sketch` section of a model):
//!
//! ```text
//! u32 fields F, u32 zero, u64 capacity, u64 min_count
//! F × (u64 total N, u64 floor, u64 entries E)
//! ΣE × (u64 hash, u64 count, u64 error, u32 token bytes L, u32 zero)
//! ΣL token bytes (UTF-8), in entry order
//! ```
//!
//! `hash` is the token's unigram hash in its field (bucket = low bits, sign =
//! bit 63; see [`crate::features`]). Readers check every bound, that tokens are
//! UTF-8, that `error ≤ count`, and (given the feature settings) that every
//! hash is the hash of its token.

use std::borrow::Cow;
use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};
use std::path::Path;

use xxhash_rust::xxh3::xxh3_64_with_seed;

use crate::container::{self, Container, ContainerWriter, Kind};
use crate::error::{Error, Result};
use crate::features::{field_seed, FeatureConfig, MAX_TOKEN_BYTES};

/// Current sketch format version.
pub const VERSION: u32 = 1;
/// Default entries kept per text field (`--sketch-size`).
pub const DEFAULT_CAPACITY: usize = 10_000;
/// Largest accepted `--sketch-size`.
pub const MAX_CAPACITY: usize = 1 << 20;
/// Default least guaranteed rows for a token to be written (`--sketch-min-count`).
pub const DEFAULT_MIN_COUNT: u64 = 20;
const SEC_SKETCH: u32 = 1;
const MAX_FIELDS: usize = 64;
/// Longest token accepted when reading (a cut token after lowercasing and masking).
const MAX_STORED_TOKEN: usize = 4 * MAX_TOKEN_BYTES;

/// One listed token.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SketchEntry {
    /// Unigram hash of the token in its field.
    pub hash: u64,
    /// Rows counted (never below the true number).
    pub count: u64,
    /// Possible overcount: `count − error` is never above the true number.
    pub error: u64,
    /// The token, after lowercasing and masking.
    pub token: String,
}

impl SketchEntry {
    /// Rows the token was certainly seen in.
    pub fn guaranteed(&self) -> u64 {
        self.count - self.error
    }
}

/// The summary of one text field.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct FieldSketch {
    /// Stream length: (row, distinct token) pairs counted.
    pub total: u64,
    /// No unlisted token was seen in more rows than this.
    pub floor: u64,
    /// Listed tokens.
    pub entries: Vec<SketchEntry>,
}

fn order(a: &SketchEntry, b: &SketchEntry) -> std::cmp::Ordering {
    b.count.cmp(&a.count).then(a.hash.cmp(&b.hash))
}

impl FieldSketch {
    /// Keep the `capacity` largest counts (ties by hash); the floor becomes the
    /// largest count dropped, or `base` when nothing is dropped.
    fn truncate(&mut self, capacity: usize, base: u64) {
        if self.entries.len() > capacity {
            self.entries.select_nth_unstable_by(capacity, order);
            let dropped = self.entries[capacity..]
                .iter()
                .map(|e| e.count)
                .max()
                .unwrap_or(0);
            self.entries.truncate(capacity);
            self.floor = base.max(dropped);
        } else {
            self.floor = base;
        }
    }

    /// Merge `other` into this summary, keeping at most `capacity` entries (see
    /// the module documentation for the rule and its guarantees).
    pub fn merge(&mut self, other: &FieldSketch, capacity: usize) {
        let entries = other
            .entries
            .iter()
            .map(|e| (e.hash, e.count, e.error, Cow::Borrowed(e.token.as_str())));
        self.merge_entries(other.floor, other.total, entries, capacity);
    }

    /// Merge the summary of one chunk (see [`ChunkCounter::finish`]): the rule
    /// of [`FieldSketch::merge`], computed by walking both lists in order of
    /// hash, which the ingest writer does once per chunk. The entries are kept
    /// in order of hash from one merge to the next (any order was allowed;
    /// [`TokenSketch::prune`] sorts them by count before they are written).
    pub fn merge_chunk(&mut self, other: &ChunkField, capacity: usize) {
        self.merge_chunk_with(other, capacity, &mut MergeScratch::default());
    }

    /// [`FieldSketch::merge_chunk`] with buffers kept from one merge to the next.
    pub fn merge_chunk_with(
        &mut self,
        other: &ChunkField,
        capacity: usize,
        scratch: &mut MergeScratch,
    ) {
        if !self.entries.is_sorted_by_key(|e| e.hash) {
            self.entries.sort_unstable_by_key(|e| e.hash);
        }
        debug_assert!(other.entries.is_sorted_by_key(|e| e.0));
        let (m1, m2) = (self.floor, other.floor);
        let mut old = std::mem::take(&mut self.entries);
        let n = old.len() + other.entries.len();
        let mut out = std::mem::take(&mut scratch.entries);
        out.clear();
        out.reserve(n);
        // For each entry of `out`, where its token lies in the chunk's text when
        // it is new (its text is copied only if it is kept), else `NONE`.
        const NONE: (u32, u32) = (u32::MAX, 0);
        let src = &mut scratch.src;
        src.clear();
        let mut mine = old.drain(..).peekable();
        let untouched = |mut e: SketchEntry| {
            e.count += m2;
            e.error += m2;
            e
        };
        for &(hash, count, start, len) in &other.entries {
            while let Some(e) = mine.next_if(|e| e.hash < hash) {
                out.push(untouched(e));
                src.push(NONE);
            }
            match mine.next_if(|e| e.hash == hash) {
                Some(mut e) => {
                    e.count += count;
                    out.push(e);
                    src.push(NONE);
                }
                None => {
                    out.push(SketchEntry {
                        hash,
                        count: count + m1,
                        error: m1,
                        token: String::new(),
                    });
                    src.push((start, len));
                }
            }
        }
        for e in mine {
            out.push(untouched(e));
            src.push(NONE);
        }
        scratch.entries = old;
        self.total += other.total;
        // Keep the `capacity` largest counts (ties by hash), in order of hash;
        // the floor becomes the largest count dropped (as `truncate`).
        let base = m1 + m2;
        if out.len() > capacity {
            let key = |e: &SketchEntry| (e.count, e.hash);
            let before = |a: &(u64, u64), b: &(u64, u64)| b.0.cmp(&a.0).then(a.1.cmp(&b.1));
            let keys = &mut scratch.keys;
            keys.clear();
            keys.extend(out.iter().map(key));
            keys.select_nth_unstable_by(capacity, before);
            let dropped = keys[capacity..].iter().map(|k| k.0).max().unwrap_or(0);
            // Hashes are distinct, so the order is total: the kept entries are
            // exactly those before the first one dropped.
            let first_dropped = keys[capacity];
            let mut w = 0;
            for i in 0..out.len() {
                if before(&key(&out[i]), &first_dropped) == std::cmp::Ordering::Less {
                    out.swap(w, i);
                    src[w] = src[i];
                    w += 1;
                }
            }
            out.truncate(w);
            src.truncate(w);
            self.floor = base.max(dropped);
        } else {
            self.floor = base;
        }
        for (e, &(start, len)) in out.iter_mut().zip(src.iter()) {
            if start != NONE.0 {
                let t = &other.text[start as usize..(start + len) as usize];
                // Tokens are UTF-8 (the tokenizer decodes): the lossy copy is a
                // fallback that never runs.
                e.token = String::from_utf8_lossy(t).into_owned();
            }
        }
        self.entries = out;
    }

    /// The merge of a chunk by the general rule, as [`FieldSketch::merge`]
    /// does it (the reference of [`FieldSketch::merge_chunk`] in tests).
    #[cfg(test)]
    fn merge_chunk_by_index(&mut self, other: &ChunkField, capacity: usize) {
        let entries = other.entries.iter().map(|&(hash, count, start, len)| {
            let t = &other.text[start as usize..(start + len) as usize];
            (hash, count, 0, String::from_utf8_lossy(t))
        });
        self.merge_entries(other.floor, other.total, entries, capacity);
    }

    /// The merge rule of the module documentation, over the entries
    /// `(hash, count, error, token)` of a summary with floor `m2` and stream
    /// length `total`. Token text is copied only for tokens new to this sketch.
    fn merge_entries<'a>(
        &mut self,
        m2: u64,
        total: u64,
        entries: impl Iterator<Item = (u64, u64, u64, Cow<'a, str>)>,
        capacity: usize,
    ) {
        let m1 = self.floor;
        let mut index: HashMap<u64, usize, IdBuild> =
            HashMap::with_capacity_and_hasher(self.entries.len(), IdBuild::default());
        for (i, e) in self.entries.iter().enumerate() {
            index.insert(e.hash, i);
        }
        let mut touched = vec![false; self.entries.len()];
        for (hash, count, error, token) in entries {
            match index.get(&hash) {
                Some(&i) => {
                    let s = &mut self.entries[i];
                    s.count += count;
                    s.error += error;
                    touched[i] = true;
                }
                None => self.entries.push(SketchEntry {
                    hash,
                    count: count + m1,
                    error: error + m1,
                    token: token.into_owned(),
                }),
            }
        }
        if m2 > 0 {
            for (e, _) in self.entries.iter_mut().zip(&touched).filter(|(_, &t)| !t) {
                e.count += m2;
                e.error += m2;
            }
        }
        self.total += total;
        self.truncate(capacity, m1 + m2);
    }

    /// Entries in order of count (largest first), ties by hash.
    pub fn sort(&mut self) {
        self.entries.sort_unstable_by(order);
    }
}

/// Buffers of [`FieldSketch::merge_chunk_with`], kept between merges so that
/// merging a chunk allocates nothing.
#[derive(Debug, Default)]
pub struct MergeScratch {
    entries: Vec<SketchEntry>,
    src: Vec<(u32, u32)>,
    keys: Vec<(u64, u64)>,
}

/// The token sketch of every text field.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenSketch {
    /// Entries kept per field.
    pub capacity: u64,
    /// Least guaranteed rows of a written token (0 before pruning).
    pub min_count: u64,
    /// One summary per text field, in the order of the feature settings.
    pub fields: Vec<FieldSketch>,
}

impl TokenSketch {
    /// An empty sketch for `fields` text fields.
    pub fn new(fields: usize, capacity: usize) -> Self {
        TokenSketch {
            capacity: capacity as u64,
            min_count: 0,
            fields: vec![FieldSketch::default(); fields],
        }
    }

    /// Merge per-field summaries (of the same fields) into this sketch.
    pub fn merge_fields(&mut self, other: &[FieldSketch]) {
        let cap = self.capacity as usize;
        for (a, b) in self.fields.iter_mut().zip(other) {
            a.merge(b, cap);
        }
    }

    /// Merge the per-field summaries of one chunk into this sketch.
    pub fn merge_chunk(&mut self, chunk: &[ChunkField]) {
        self.merge_chunk_with(chunk, &mut MergeScratch::default());
    }

    /// [`TokenSketch::merge_chunk`] with buffers kept from one merge to the next.
    pub fn merge_chunk_with(&mut self, chunk: &[ChunkField], scratch: &mut MergeScratch) {
        let cap = self.capacity as usize;
        for (a, b) in self.fields.iter_mut().zip(chunk) {
            a.merge_chunk_with(b, cap, scratch);
        }
    }

    /// Merge another sketch of the same fields (the larger capacity and
    /// min count are kept).
    pub fn merge(&mut self, other: &TokenSketch) {
        self.capacity = self.capacity.max(other.capacity);
        self.min_count = self.min_count.max(other.min_count);
        self.merge_fields(&other.fields);
    }

    /// Drop every token whose guaranteed count is below `min_count` (raising
    /// each floor to the largest count dropped) and sort the entries.
    pub fn prune(&mut self, min_count: u64) {
        self.min_count = self.min_count.max(min_count);
        let min = self.min_count;
        for f in &mut self.fields {
            let mut dropped = 0;
            f.entries.retain(|e| {
                let keep = e.guaranteed() >= min;
                if !keep {
                    dropped = dropped.max(e.count);
                }
                keep
            });
            f.floor = f.floor.max(dropped);
            f.sort();
        }
    }

    /// Listed tokens over all fields.
    pub fn len(&self) -> usize {
        self.fields.iter().map(|f| f.entries.len()).sum()
    }

    /// Whether no token is listed.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Serialise (layout in the module documentation).
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut b = Vec::new();
        b.extend_from_slice(&(self.fields.len() as u32).to_le_bytes());
        b.extend_from_slice(&0u32.to_le_bytes());
        b.extend_from_slice(&self.capacity.to_le_bytes());
        b.extend_from_slice(&self.min_count.to_le_bytes());
        for f in &self.fields {
            for v in [f.total, f.floor, f.entries.len() as u64] {
                b.extend_from_slice(&v.to_le_bytes());
            }
        }
        for e in self.fields.iter().flat_map(|f| &f.entries) {
            for v in [e.hash, e.count, e.error] {
                b.extend_from_slice(&v.to_le_bytes());
            }
            b.extend_from_slice(&(e.token.len() as u32).to_le_bytes());
            b.extend_from_slice(&0u32.to_le_bytes());
        }
        for e in self.fields.iter().flat_map(|f| &f.entries) {
            b.extend_from_slice(e.token.as_bytes());
        }
        b
    }

    /// Parse and check bytes written by [`TokenSketch::to_bytes`]; `path` names
    /// the file in errors.
    pub fn from_bytes(bytes: &[u8], path: &Path) -> Result<TokenSketch> {
        let bad = |what: String| Error::Corrupt {
            path: path.to_path_buf(),
            what: format!("token sketch: {what}"),
        };
        let mut r = Reader { bytes, at: 0 };
        let short = |what: &str| bad(format!("ends inside the {what}"));
        let fields = r.u32().ok_or_else(|| short("header"))? as usize;
        let zero = r.u32().ok_or_else(|| short("header"))?;
        let capacity = r.u64().ok_or_else(|| short("header"))?;
        let min_count = r.u64().ok_or_else(|| short("header"))?;
        if zero != 0 || fields == 0 || fields > MAX_FIELDS {
            return Err(bad(format!(
                "{fields} fields (or a non-zero reserved word)"
            )));
        }
        if capacity == 0 || capacity > MAX_CAPACITY as u64 {
            return Err(bad(format!("capacity {capacity} out of range")));
        }
        let mut heads = Vec::with_capacity(fields);
        let mut n_entries = 0u64;
        for _ in 0..fields {
            let (total, floor, n) = r.three().ok_or_else(|| short("field table"))?;
            if n > capacity {
                return Err(bad(format!("{n} entries exceed the capacity {capacity}")));
            }
            n_entries += n;
            heads.push((total, floor, n));
        }
        if n_entries.saturating_mul(32) > (bytes.len() - r.at) as u64 {
            return Err(bad(format!("{n_entries} entries do not fit the section")));
        }
        let mut raw = Vec::with_capacity(n_entries as usize);
        let mut token_bytes = 0usize;
        for _ in 0..n_entries {
            let (hash, count, error) = r.three().ok_or_else(|| short("entries"))?;
            let len = r.u32().ok_or_else(|| short("entries"))? as usize;
            let zero = r.u32().ok_or_else(|| short("entries"))?;
            if zero != 0 || len == 0 || len > MAX_STORED_TOKEN || error > count {
                return Err(bad(format!(
                    "entry with token length {len}, count {count}, error {error}"
                )));
            }
            token_bytes += len;
            raw.push((hash, count, error, len));
        }
        if token_bytes != bytes.len() - r.at {
            return Err(Error::Size {
                path: path.to_path_buf(),
                what: "token sketch text".into(),
                expected: token_bytes as u64,
                got: (bytes.len() - r.at) as u64,
            });
        }
        let mut out = TokenSketch {
            capacity,
            min_count,
            fields: Vec::with_capacity(fields),
        };
        let mut it = raw.into_iter();
        for (total, floor, n) in heads {
            let mut f = FieldSketch {
                total,
                floor,
                entries: Vec::with_capacity(n as usize),
            };
            for (hash, count, error, len) in it.by_ref().take(n as usize) {
                let t = &bytes[r.at..r.at + len];
                r.at += len;
                let token = std::str::from_utf8(t)
                    .map_err(|_| bad("a token is not UTF-8".into()))?
                    .to_string();
                f.entries.push(SketchEntry {
                    hash,
                    count,
                    error,
                    token,
                });
            }
            out.fields.push(f);
        }
        Ok(out)
    }

    /// Check that the sketch belongs to these feature settings: one summary per
    /// text field and every hash the hash of its token.
    pub fn check(&self, cfg: &FeatureConfig, path: &Path) -> Result<()> {
        if self.fields.len() != cfg.text_fields.len() {
            return Err(Error::Mismatch {
                path: path.to_path_buf(),
                what: format!(
                    "token sketch has {} fields, the feature settings {}",
                    self.fields.len(),
                    cfg.text_fields.len()
                ),
            });
        }
        for (f, name) in self.fields.iter().zip(&cfg.text_fields) {
            let seed = field_seed(cfg.hash_seed, name);
            if let Some(e) = f
                .entries
                .iter()
                .find(|e| xxh3_64_with_seed(e.token.as_bytes(), seed) != e.hash)
            {
                return Err(Error::Mismatch {
                    path: path.to_path_buf(),
                    what: format!(
                        "token sketch entry {:?} of field {name:?} does not hash to its stored hash under the feature settings",
                        e.token
                    ),
                });
            }
        }
        Ok(())
    }
}

struct Reader<'a> {
    bytes: &'a [u8],
    at: usize,
}

impl Reader<'_> {
    fn u32(&mut self) -> Option<u32> {
        let b = self.bytes.get(self.at..self.at + 4)?;
        self.at += 4;
        Some(u32::from_le_bytes(b.try_into().ok()?))
    }
    fn u64(&mut self) -> Option<u64> {
        let b = self.bytes.get(self.at..self.at + 8)?;
        self.at += 8;
        Some(u64::from_le_bytes(b.try_into().ok()?))
    }
    fn three(&mut self) -> Option<(u64, u64, u64)> {
        Some((self.u64()?, self.u64()?, self.u64()?))
    }
}

/// Write a sketch file for ingest batch `batch`. Returns the header checksum.
pub fn write(path: &Path, sketch: &TokenSketch, batch: u32) -> Result<u64> {
    let mut w = ContainerWriter::create(path, Kind::TokenSketch, VERSION, 1)?;
    w.section(SEC_SKETCH, &sketch.to_bytes())?;
    w.set_params([
        sketch.fields.len() as u64,
        sketch.capacity,
        sketch.min_count,
        batch as u64,
    ]);
    w.finish()?;
    Ok(open(path)?.header_checksum())
}

/// Map a sketch file and check its header.
fn open(path: &Path) -> Result<Container<container::FileBytes>> {
    Container::parse(
        container::map_file(path)?,
        path,
        Kind::TokenSketch,
        VERSION..=VERSION,
    )
}

/// Open a sketch file, verify every checksum and parse it.
pub fn read(path: &Path) -> Result<(TokenSketch, u64)> {
    let c = open(path)?;
    c.verify(|id| match id {
        SEC_SKETCH => "sketch".into(),
        other => format!("unknown section {other}"),
    })?;
    let s = TokenSketch::from_bytes(c.section(SEC_SKETCH, "sketch")?, path)?;
    let p = c.header().params;
    if p[0] != s.fields.len() as u64 || p[1] != s.capacity || p[2] != s.min_count {
        return Err(Error::Corrupt {
            path: path.to_path_buf(),
            what: "header and token sketch disagree".into(),
        });
    }
    Ok((s, c.header_checksum()))
}

/// The merged, pruned sketch of the dataset in `dir` (all batches that kept
/// one, merged in batch order), checked against its feature settings; `None`
/// when no batch kept a sketch.
pub fn load(dir: &Path, m: &super::Manifest) -> Result<Option<TokenSketch>> {
    let mut out: Option<TokenSketch> = None;
    for e in &m.sketches {
        let path = dir.join(&e.file);
        let (s, sum) = read(&path)?;
        if format!("{sum:016x}") != e.checksum {
            return Err(Error::Mismatch {
                path,
                what: "token sketch is not the file the manifest lists".into(),
            });
        }
        s.check(&m.features, &path)?;
        match &mut out {
            Some(o) => o.merge(&s),
            None => out = Some(s),
        }
    }
    if let Some(o) = &mut out {
        let min = o.min_count;
        o.prune(min);
    }
    Ok(out)
}

/// Identity hasher for keys that are already uniform 64-bit hashes.
#[derive(Default, Clone, Copy)]
pub struct IdHasher(u64);

impl Hasher for IdHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = self.0.rotate_left(8) ^ b as u64;
        }
    }
    fn write_u64(&mut self, v: u64) {
        self.0 = v;
    }
}

type IdBuild = BuildHasherDefault<IdHasher>;

/// Exact per-row token counts of one chunk (one per worker, reused).
#[derive(Default)]
pub struct ChunkCounter {
    fields: Vec<FieldCounter>,
    row: u32,
    /// Scratch of [`sort_by_hash`].
    scratch: SortScratch,
}

/// A token of a chunk's summary: hash, rows, start and length of its text.
type ChunkEntry = (u64, u64, u32, u32);

/// Sort a chunk's entries by hash (distinct), as the standard sort would.
///
/// The hashes are uniform, so the entries are first spread over about one bin
/// per entry by their top bits (a counting sort), and each bin is then sorted on
/// its own: by insertion when it holds a few entries, as it does for hashes of
/// real tokens (expected linear time), by the standard sort when it holds more,
/// so that hashes made to share their top bits cost `O(n log n)`, not `O(n²)`.
fn sort_by_hash(entries: &mut Vec<ChunkEntry>, scratch: &mut SortScratch) {
    let n = entries.len();
    if n < 64 {
        entries.sort_unstable_by_key(|e| e.0);
        return;
    }
    let bits = n.next_power_of_two().trailing_zeros();
    let bin = |h: u64| (h >> (64 - bits)) as usize;
    let SortScratch { bins, entries: out } = scratch;
    bins.clear();
    bins.resize(1 << bits, 0);
    for e in entries.iter() {
        bins[bin(e.0)] += 1;
    }
    let mut sum = 0;
    for c in bins.iter_mut() {
        (*c, sum) = (sum, sum + *c);
    }
    out.clear();
    out.resize(n, (0, 0, 0, 0));
    for &e in entries.iter() {
        let b = bin(e.0);
        out[bins[b] as usize] = e;
        bins[b] += 1;
    }
    // `bins[b]` is now where bin `b` ends.
    let mut from = 0;
    for &end in bins.iter() {
        let part = &mut out[from..end as usize];
        if part.len() > 16 {
            part.sort_unstable_by_key(|e| e.0);
        } else {
            for i in 1..part.len() {
                let e = part[i];
                let mut j = i;
                while j > 0 && part[j - 1].0 > e.0 {
                    part[j] = part[j - 1];
                    j -= 1;
                }
                part[j] = e;
            }
        }
        from = end as usize;
    }
    std::mem::swap(entries, out);
}

/// Buffers of [`sort_by_hash`], kept from chunk to chunk.
#[derive(Default)]
struct SortScratch {
    bins: Vec<u32>,
    entries: Vec<ChunkEntry>,
}

/// A counted token: its hash, rows, the last row it was counted in, and where
/// its text lies in the arena (`len == 0` marks an empty slot: tokens are never
/// empty).
#[derive(Clone, Copy, Default)]
struct Slot {
    hash: u64,
    count: u32,
    last_row: u32,
    start: u32,
    len: u32,
}

/// An open-addressing table (linear probing, at most half full) of the chunk's
/// tokens: a repeated token costs one probe, usually in one cache line.
struct FieldCounter {
    table: Vec<Slot>,
    /// Positions in use, in order of first sight (also what to clear).
    used: Vec<u32>,
    text: Vec<u8>,
    total: u64,
}

impl Default for FieldCounter {
    fn default() -> Self {
        FieldCounter {
            table: vec![Slot::default(); 1 << 12],
            used: Vec::new(),
            text: Vec::new(),
            total: 0,
        }
    }
}

impl FieldCounter {
    /// Double the table and put every token back.
    fn grow(&mut self) {
        let mut table = vec![Slot::default(); self.table.len() * 2];
        let mask = table.len() - 1;
        for p in &mut self.used {
            let s = self.table[*p as usize];
            let mut i = s.hash as usize & mask;
            while table[i].len != 0 {
                i = (i + 1) & mask;
            }
            table[i] = s;
            *p = i as u32;
        }
        self.table = table;
    }
}

/// The counter of one text field for the current row ([`ChunkCounter::field`]).
pub struct FieldTokens<'a> {
    f: &'a mut FieldCounter,
    row: u32,
}

impl FieldTokens<'_> {
    /// Count `token` (with unigram hash `hash`), once per row.
    ///
    /// The common case, a token already in its first slot, is kept small so that
    /// it is inlined into the tokenizer's loop; the rest (probing on, a new
    /// token, growing the table) is a call.
    #[inline(always)]
    pub fn see(&mut self, token: &[u8], hash: u64) {
        let (row, f) = (self.row, &mut *self.f);
        let mask = f.table.len() - 1;
        let s = &mut f.table[hash as usize & mask];
        if s.hash == hash && s.len != 0 {
            if s.last_row != row {
                s.last_row = row;
                s.count += 1;
                f.total += 1;
            }
            return;
        }
        f.see_probing(row, token, hash);
    }
}

impl FieldCounter {
    /// [`FieldTokens::see`] by the whole probe: every slot from the token's
    /// first, until the token or an empty slot.
    #[inline(never)]
    fn see_probing(&mut self, row: u32, token: &[u8], hash: u64) {
        let mask = self.table.len() - 1;
        let mut i = hash as usize & mask;
        loop {
            let s = &mut self.table[i];
            if s.len == 0 {
                *s = Slot {
                    hash,
                    count: 1,
                    last_row: row,
                    start: self.text.len() as u32,
                    len: token.len() as u32,
                };
                self.text.extend_from_slice(token);
                self.total += 1;
                self.used.push(i as u32);
                if 2 * self.used.len() > self.table.len() {
                    self.grow();
                }
                return;
            }
            if s.hash == hash {
                if s.last_row != row {
                    s.last_row = row;
                    s.count += 1;
                    self.total += 1;
                }
                return;
            }
            i = (i + 1) & mask;
        }
    }
}

impl ChunkCounter {
    /// A counter for `fields` text fields.
    pub fn new(fields: usize) -> Self {
        ChunkCounter {
            fields: (0..fields).map(|_| FieldCounter::default()).collect(),
            row: 0,
            scratch: SortScratch::default(),
        }
    }

    /// Start a row: tokens seen from here on count once each until the next call.
    #[inline]
    pub fn next_row(&mut self) {
        self.row += 1;
    }

    /// Count `token` (with unigram hash `hash`) in text field `field`, once per row.
    #[inline]
    pub fn see(&mut self, field: usize, token: &[u8], hash: u64) {
        self.field(field).see(token, hash);
    }

    /// The counter of text field `field` for the current row (look the field up
    /// once per text, not once per word).
    #[inline]
    pub fn field(&mut self, field: usize) -> FieldTokens<'_> {
        FieldTokens {
            f: &mut self.fields[field],
            row: self.row,
        }
    }

    /// The chunk's summaries (at most `capacity` entries per field, floor =
    /// largest count dropped); the counter is emptied for the next chunk.
    pub fn finish(&mut self, capacity: usize) -> Vec<ChunkField> {
        let mut out = Vec::new();
        self.finish_into(capacity, &mut out);
        out
    }

    /// [`ChunkCounter::finish`] into summaries already allocated (those of an
    /// earlier chunk, whose buffers are reused).
    pub fn finish_into(&mut self, capacity: usize, out: &mut Vec<ChunkField>) {
        self.row = 0;
        out.resize_with(self.fields.len(), ChunkField::default);
        for (f, o) in self.fields.iter_mut().zip(out.iter_mut()) {
            let mut entries = std::mem::take(&mut o.entries);
            entries.clear();
            entries.extend(f.used.drain(..).map(|p| {
                let s = std::mem::take(&mut f.table[p as usize]);
                (s.hash, s.count as u64, s.start, s.len)
            }));
            let mut floor = 0;
            if entries.len() > capacity {
                entries.select_nth_unstable_by_key(capacity, |e| (std::cmp::Reverse(e.1), e.0));
                floor = entries[capacity..].iter().map(|e| e.1).max().unwrap_or(0);
                entries.truncate(capacity);
            }
            // In order of hash, as [`FieldSketch::merge_chunk`] walks them
            // (sorted here, in the worker, rather than in the writer).
            sort_by_hash(&mut entries, &mut self.scratch);
            // The summary takes the text; the counter gets the old summary's
            // buffer.
            let mut text = std::mem::take(&mut o.text);
            text.clear();
            std::mem::swap(&mut text, &mut f.text);
            *o = ChunkField {
                total: f.total,
                floor,
                entries,
                text,
            };
            f.total = 0;
        }
    }
}

/// The summary of one text field of one chunk: entries `(hash, count, text
/// start, text length)`, exact counts (error 0), their text in one buffer.
#[derive(Debug, Default)]
pub struct ChunkField {
    /// Stream length of the chunk.
    pub total: u64,
    /// No token left out was seen in more of the chunk's rows than this.
    pub floor: u64,
    entries: Vec<(u64, u64, u32, u32)>,
    text: Vec<u8>,
}

impl ChunkField {
    /// As a [`FieldSketch`] (for tests and tools; ingest merges chunks directly).
    pub fn to_sketch(&self) -> FieldSketch {
        let mut f = FieldSketch::default();
        f.merge_chunk(self, self.entries.len().max(1));
        f
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::features::HASH_SCHEME;

    fn cfg() -> FeatureConfig {
        FeatureConfig {
            scheme: HASH_SCHEME.into(),
            hash_seed: 3,
            log2_buckets: 12,
            ngrams: 1,
            char_ngrams: None,
            raw_counts: false,
            text_fields: vec!["subject".into(), "body".into()],
            numeric_fields: vec![],
            mask_digits: false,
            mask_emails: false,
        }
    }

    #[test]
    fn chunk_entries_sort_by_hash_like_the_standard_sort() {
        let mut x = 0x9E37_79B9_7F4A_7C15u64;
        let mut scratch = SortScratch::default();
        for n in [0, 1, 63, 64, 65, 1000, 8191, 8192, 8193, 20000] {
            let mut e: Vec<ChunkEntry> = (0..n)
                .map(|i| {
                    x ^= x << 13;
                    x ^= x >> 7;
                    x ^= x << 17;
                    // Hashes bunched in a few bins too (some sharing all their
                    // top bits, as crafted tokens could), not only uniform ones.
                    let h = match i % 4 {
                        0 => x >> 40,
                        1 => x & 0xffff,
                        _ => x,
                    };
                    (h, i as u64, i as u32, 1)
                })
                .collect();
            e.sort_unstable_by_key(|e| e.0);
            e.dedup_by_key(|e| e.0);
            let want: Vec<ChunkEntry> = e.clone();
            e.reverse();
            sort_by_hash(&mut e, &mut scratch);
            assert_eq!(e, want, "{n} entries");
        }
    }

    fn entry(field: &str, token: &str, count: u64, error: u64) -> SketchEntry {
        SketchEntry {
            hash: xxh3_64_with_seed(token.as_bytes(), field_seed(3, field)),
            count,
            error,
            token: token.into(),
        }
    }

    fn sample() -> TokenSketch {
        TokenSketch {
            capacity: 4,
            min_count: 2,
            fields: vec![
                FieldSketch {
                    total: 30,
                    floor: 1,
                    entries: vec![
                        entry("subject", "ferry", 9, 0),
                        entry("subject", "été", 4, 1),
                    ],
                },
                FieldSketch {
                    total: 5,
                    floor: 0,
                    entries: vec![entry("body", "#", 3, 0)],
                },
            ],
        }
    }

    #[test]
    fn bytes_round_trip_and_hashes_check() {
        let s = sample();
        let p = Path::new("x");
        let back = TokenSketch::from_bytes(&s.to_bytes(), p).unwrap();
        assert_eq!(back, s);
        back.check(&cfg(), p).unwrap();
        let mut other = cfg();
        other.hash_seed = 4;
        assert!(matches!(back.check(&other, p), Err(Error::Mismatch { .. })));
        // Every truncation is caught with a structured error, never a panic.
        let b = s.to_bytes();
        for n in 0..b.len() {
            let e = TokenSketch::from_bytes(&b[..n], p).unwrap_err();
            assert!(
                matches!(e, Error::Corrupt { .. } | Error::Size { .. }),
                "{n}: {e}"
            );
        }
    }

    #[test]
    fn file_round_trip_flipped_byte_and_truncation() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("sketch-000001.tmk");
        let s = sample();
        let sum = write(&p, &s, 0).unwrap();
        let (back, sum2) = read(&p).unwrap();
        assert_eq!((back, sum2), (s, sum));
        let good = std::fs::read(&p).unwrap();
        // A flipped byte in the section: its checksum.
        let (off, len) = {
            let c = Container::parse(
                container::AlignedBytes::from_slice(&good),
                &p,
                Kind::TokenSketch,
                1..=1,
            )
            .unwrap();
            let e = c.header().sections[0];
            (e.offset as usize, e.len as usize)
        };
        let mut bad = good.clone();
        bad[off + len / 2] ^= 0x01;
        std::fs::write(&p, &bad).unwrap();
        match read(&p).unwrap_err() {
            Error::Checksum { section, .. } => assert_eq!(section, "sketch"),
            e => panic!("wrong error {e}"),
        }
        // Truncated: the file length in the header.
        std::fs::write(&p, &good[..good.len() - 3]).unwrap();
        assert!(matches!(read(&p).unwrap_err(), Error::Size { .. }));
        // Another kind of file.
        std::fs::write(&p, b"\x89TAMIS\r\n\x02\0\0\0").unwrap();
        assert!(read(&p).is_err());
    }

    /// Exact counts per chunk, then merged: the counter and the merge agree
    /// with exact counting when nothing is dropped.
    #[test]
    fn counter_counts_once_per_row_and_merges_exactly_when_small() {
        let mut c = ChunkCounter::new(1);
        let rows: [&[&str]; 3] = [&["a", "b", "a"], &["a"], &["c", "b"]];
        for r in rows {
            c.next_row();
            for t in r {
                c.see(0, t.as_bytes(), xxh3_64_with_seed(t.as_bytes(), 0));
            }
        }
        let chunk = c.finish(10);
        let mut f = vec![chunk[0].to_sketch()];
        assert_eq!(f[0].total, 5);
        f[0].sort();
        let mut got: Vec<(&str, u64)> = f[0]
            .entries
            .iter()
            .map(|e| (e.token.as_str(), e.count))
            .collect();
        got.sort();
        assert_eq!(got, [("a", 2), ("b", 2), ("c", 1)]);
        let mut g = TokenSketch::new(1, 10);
        g.merge_fields(&f);
        g.merge_fields(&f);
        assert_eq!(g.fields[0].floor, 0);
        assert!(g.fields[0].entries.iter().all(|e| e.error == 0));
        assert_eq!(g.fields[0].total, 10);
        // The counter is empty again.
        assert_eq!(c.finish(10)[0].total, 0);
    }

    #[test]
    fn prune_keeps_guaranteed_counts_and_raises_the_floor() {
        let mut s = sample();
        s.prune(4);
        let f = &s.fields[0];
        assert_eq!(f.entries.len(), 1);
        assert_eq!(f.floor, 4, "the dropped token had count 4");
        assert!(s.fields[1].entries.is_empty());
        assert_eq!(s.fields[1].floor, 3);
    }

    /// A stream of `rows` rows of `per_row` tokens drawn from a Zipf law
    /// (exponent 1.1) over `vocab` words, seeded.
    fn zipf_rows(rows: usize, per_row: usize, vocab: usize, seed: u64) -> Vec<Vec<u32>> {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let weights: Vec<f64> = (1..=vocab).map(|r| (r as f64).powf(-1.1)).collect();
        let total: f64 = weights.iter().sum();
        let mut cdf = Vec::with_capacity(vocab);
        let mut acc = 0.0;
        for w in &weights {
            acc += w / total;
            cdf.push(acc);
        }
        (0..rows)
            .map(|_| {
                (0..per_row)
                    .map(|_| {
                        let u: f64 = rng.random();
                        cdf.partition_point(|&c| c < u).min(vocab - 1) as u32
                    })
                    .collect()
            })
            .collect()
    }

    fn tok(i: u32) -> String {
        format!("w{i}")
    }

    fn h(i: u32) -> u64 {
        xxh3_64_with_seed(tok(i).as_bytes(), 0)
    }

    /// Exact rows per token (a token counts once per row).
    fn exact(rows: &[Vec<u32>]) -> HashMap<u64, u64> {
        let mut f = HashMap::new();
        for r in rows {
            let mut d = r.clone();
            d.sort();
            d.dedup();
            for t in d {
                *f.entry(h(t)).or_insert(0) += 1;
            }
        }
        f
    }

    /// Ingest's scheme: exact counts per chunk of `chunk` rows, cut to
    /// `capacity`, merged in order.
    fn sketch_by_chunks(rows: &[Vec<u32>], chunk: usize, capacity: usize) -> FieldSketch {
        let mut g = TokenSketch::new(1, capacity);
        let mut c = ChunkCounter::new(1);
        for part in rows.chunks(chunk) {
            for r in part {
                c.next_row();
                for &t in r {
                    c.see(0, tok(t).as_bytes(), h(t));
                }
            }
            g.merge_chunk(&c.finish(capacity));
        }
        g.fields.pop().unwrap()
    }

    /// Merging chunks by walking hashes in order gives the summary the general
    /// rule gives, chunk after chunk, whether chunks are truncated or not.
    #[test]
    fn merge_chunk_in_hash_order_matches_the_general_rule() {
        for (capacity, chunk, seed) in [(10, 50, 1), (40, 200, 2), (500, 300, 3), (7, 1, 4)] {
            let rows = zipf_rows(3000, 6, 400, seed);
            let mut fast = FieldSketch::default();
            let mut slow = FieldSketch::default();
            let mut c = ChunkCounter::new(1);
            for part in rows.chunks(chunk) {
                for r in part {
                    c.next_row();
                    for &t in r {
                        c.see(0, tok(t).as_bytes(), h(t));
                    }
                }
                let summary = c.finish(capacity);
                fast.merge_chunk(&summary[0], capacity);
                slow.merge_chunk_by_index(&summary[0], capacity);
                let (mut a, mut b) = (fast.clone(), slow.clone());
                a.sort();
                b.sort();
                assert_eq!(a, b, "capacity {capacity}, chunk {chunk}");
            }
        }
    }

    /// The guarantees of Space-Saving (Metwally, Agrawal, El Abbadi 2005,
    /// section 3, from memory: the minimum counter is at most N/m; every item
    /// more frequent than it is monitored; a monitored count overestimates by
    /// at most its error, and the error is at most the minimum), in the form
    /// this module keeps them (floor for minimum), against exact counts.
    fn assert_guarantees(s: &FieldSketch, f: &HashMap<u64, u64>, n: u64, k: usize, what: &str) {
        assert_eq!(s.total, n, "{what}: stream length");
        assert!(s.entries.len() <= k);
        assert!(
            s.floor * k as u64 <= n,
            "{what}: floor {} > N/k = {n}/{k}",
            s.floor
        );
        let listed: HashMap<u64, &SketchEntry> = s.entries.iter().map(|e| (e.hash, e)).collect();
        for (hash, &fx) in f {
            match listed.get(hash) {
                Some(e) => {
                    assert!(e.count >= fx, "{what}: count {} < f {fx}", e.count);
                    assert!(e.count - e.error <= fx, "{what}: lower bound above f");
                    assert!(e.error <= s.floor, "{what}: error above the floor");
                }
                None => {
                    assert!(fx <= s.floor, "{what}: unlisted f {fx} > floor {}", s.floor);
                    assert!(fx * k as u64 <= n, "{what}: f {fx} > N/k missing");
                }
            }
        }
    }

    /// Textbook Space-Saving, one item at a time (an independent reference
    /// written from the paper's description): increment a monitored item;
    /// otherwise replace an item of minimum count (ties: the largest hash),
    /// taking count min + 1 and error min.
    fn textbook(rows: &[Vec<u32>], k: usize) -> HashMap<u64, (u64, u64)> {
        let mut m: HashMap<u64, (u64, u64)> = HashMap::new();
        for r in rows {
            let mut d = r.clone();
            d.sort();
            d.dedup();
            for t in d {
                let key = h(t);
                if let Some(e) = m.get_mut(&key) {
                    e.0 += 1;
                } else if m.len() < k {
                    m.insert(key, (1, 0));
                } else {
                    let (&victim, &(min, _)) = m
                        .iter()
                        .min_by(|a, b| a.1 .0.cmp(&b.1 .0).then(b.0.cmp(a.0)))
                        .unwrap();
                    m.remove(&victim);
                    m.insert(key, (min + 1, min));
                }
            }
        }
        m
    }

    fn top_tokens(f: &HashMap<u64, u64>, n: usize) -> Vec<u64> {
        let mut v: Vec<(u64, u64)> = f.iter().map(|(&h, &c)| (c, h)).collect();
        v.sort_by(|a, b| b.0.cmp(&a.0).then(a.1.cmp(&b.1)));
        v.truncate(n);
        let mut hs: Vec<u64> = v.into_iter().map(|x| x.1).collect();
        hs.sort();
        hs
    }

    #[test]
    fn space_saving_guarantees_hold_on_a_zipf_stream() {
        let k = 100;
        let rows = zipf_rows(20_000, 1, 5000, 42);
        let f = exact(&rows);
        let n: u64 = f.values().sum();
        assert_eq!(n, 20_000);
        // The reference implementation meets the paper's guarantees...
        let tb = textbook(&rows, k);
        let min = tb.values().map(|e| e.0).min().unwrap();
        assert!(min * k as u64 <= n);
        for (hash, &fx) in &f {
            match tb.get(hash) {
                Some(&(c, e)) => assert!(c >= fx && c - e <= fx && e <= min),
                None => assert!(fx <= min),
            }
        }
        // ...and so does ingest's scheme, for every chunk size (1 row per
        // chunk is the one-item-at-a-time case).
        for chunk in [1, 7, 100, 5000] {
            let s = sketch_by_chunks(&rows, chunk, k);
            assert_guarantees(&s, &f, n, k, &format!("chunks of {chunk}"));
            // The ten most frequent words are found, as the reference finds them.
            let mut mine: Vec<u64> = {
                let mut e = s.entries.clone();
                e.sort_by(order);
                e.iter().take(10).map(|e| e.hash).collect()
            };
            mine.sort();
            assert_eq!(mine, top_tokens(&f, 10), "chunks of {chunk}");
        }
        let mut tb_top: Vec<(u64, u64)> = tb.iter().map(|(&h, &(c, _))| (c, h)).collect();
        tb_top.sort_by(|a, b| b.0.cmp(&a.0).then(a.1.cmp(&b.1)));
        let mut tb10: Vec<u64> = tb_top.iter().take(10).map(|x| x.1).collect();
        tb10.sort();
        assert_eq!(tb10, top_tokens(&f, 10));
    }

    #[test]
    fn rows_with_several_tokens_count_each_once() {
        let k = 64;
        let rows = zipf_rows(6000, 12, 3000, 7);
        let f = exact(&rows);
        let n: u64 = f.values().sum();
        for chunk in [1, 33, 1000] {
            let s = sketch_by_chunks(&rows, chunk, k);
            assert_guarantees(&s, &f, n, k, &format!("rows of 12, chunks of {chunk}"));
        }
    }

    #[test]
    fn merging_halves_keeps_the_bounds_and_an_empty_sketch_changes_nothing() {
        let k = 80;
        let rows = zipf_rows(10_000, 3, 4000, 9);
        let f = exact(&rows);
        let n: u64 = f.values().sum();
        let (a, b) = rows.split_at(3000);
        let mut sa = sketch_by_chunks(a, 500, k);
        let sb = sketch_by_chunks(b, 500, k);
        let before = sa.clone();
        sa.merge(&FieldSketch::default(), k);
        sa.sort();
        let mut before = before;
        before.sort();
        assert_eq!(sa, before, "merging an empty summary changes nothing");
        sa.merge(&sb, k);
        assert_guarantees(&sa, &f, n, k, "halves");
        // Pruning keeps the bounds for what is written.
        let mut t = TokenSketch {
            capacity: k as u64,
            min_count: 0,
            fields: vec![sa],
        };
        t.prune(50);
        let s = &t.fields[0];
        assert!(s.entries.iter().all(|e| e.guaranteed() >= 50));
        for (hash, &fx) in &f {
            if !s.entries.iter().any(|e| e.hash == *hash) {
                assert!(fx <= s.floor);
            }
        }
    }
}
