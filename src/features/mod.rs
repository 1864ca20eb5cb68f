//! Text to sparse rows: tokenizer, n-grams and signed feature hashing.
//!
//! The scheme (version [`HASH_SCHEME`]) is part of every manifest and model, so a
//! model trained on one machine scores the same text the same way anywhere:
//!
//! * **Tokens.** Text is split at every character that is not alphanumeric
//!   (Unicode `Alphabetic` or `Numeric`); tokens are lowercased (ASCII by table,
//!   other characters by Unicode's lowercase mapping). Invalid UTF-8 sequences act
//!   as separators and are counted.
//! * **Field seed.** Each text field has a seed `xxh3_64(field name, seed: hash_seed)`,
//!   so the same word in a subject line and in a body lands in different buckets.
//! * **Unigram** `t`: `h = xxh3_64(utf8(t), seed: field_seed)`.
//! * **Word n-gram** of `n ≥ 2` consecutive tokens with unigram hashes
//!   `h1..hn`: `h = xxh3_64(le_bytes(h1) ‖ … ‖ le_bytes(hn), seed: field_seed ^ n·φ)`
//!   with `φ = 0x9E37_79B9_7F4A_7C15`.
//! * **Character n-gram** of length `n` inside a token padded as `"<token>"`:
//!   `h = xxh3_64(utf8(gram), seed: field_seed ^ CHAR_SALT ^ n·φ)`, for every `n`
//!   in `min..=max` (grams longer than the padded token are skipped).
//! * **Numeric field** `name`: `h = xxh3_64(name, seed: hash_seed ^ NUMERIC_SALT)`.
//! * **Bucket and sign** (Weinberger et al. 2009, signed hashing): bucket =
//!   `h & (2^K − 1)`, sign = `−1` if bit 63 of `h` is set, else `+1`.
//! * **Values.** Signed counts are summed per bucket; by default each text entry
//!   becomes `sign(c)·ln(1 + |c|)` and the text part of the row is scaled to unit
//!   L2 norm. Numeric features are then added with their value times their sign,
//!   neither damped nor normalised. Entries that cancel to zero are dropped.

use serde::{Deserialize, Serialize};
use xxhash_rust::xxh3::xxh3_64_with_seed;

use crate::error::{Error, Result};

mod keysort;
use keysort::{sort_keys, WideSort};

/// Identifier of the tokenizing and hashing scheme described in this module.
pub const HASH_SCHEME: &str = "tamis-xxh3-signed-1";
/// Odd constant used to separate n-gram orders (2^64 / golden ratio).
const PHI: u64 = 0x9E37_79B9_7F4A_7C15;
/// Salt for character n-grams.
const CHAR_SALT: u64 = 0x6368_6172_6772_616D; // "chargram"
/// Salt for numeric features.
const NUMERIC_SALT: u64 = 0x6E75_6D65_7269_6321; // "numeric!"
/// The token that stands for a run of digits under `mask_digits`: `order12345`
/// becomes `order#`, `2026` becomes `#`. It holds a character the tokenizer never
/// keeps, so it cannot be mistaken for a word.
pub const DIGITS_PLACEHOLDER: &str = "#";
/// The token that stands for an e-mail-like span under `mask_emails`.
pub const EMAIL_PLACEHOLDER: &str = "@email";
/// Longest token kept whole; longer runs are cut (bounded work per token).
pub const MAX_TOKEN_BYTES: usize = 256;
/// Accepted range of `log2_buckets`.
pub const LOG2_BUCKETS_RANGE: std::ops::RangeInclusive<u32> = 10..=28;
/// Accepted range of word n-gram orders.
pub const NGRAMS_RANGE: std::ops::RangeInclusive<u32> = 1..=5;

/// Character n-gram lengths (inclusive).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct CharNgrams {
    /// Shortest gram, in characters.
    pub min: u32,
    /// Longest gram, in characters.
    pub max: u32,
}

impl std::str::FromStr for CharNgrams {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        let (a, b) = s
            .split_once("..")
            .ok_or_else(|| format!("expected MIN..MAX such as 3..5, got {s:?}"))?;
        let min: u32 = a.trim().parse().map_err(|_| format!("bad MIN in {s:?}"))?;
        let max: u32 = b.trim().parse().map_err(|_| format!("bad MAX in {s:?}"))?;
        if min == 0 || min > max || max > 16 {
            return Err(format!("need 1 <= MIN <= MAX <= 16, got {s:?}"));
        }
        Ok(CharNgrams { min, max })
    }
}

impl std::fmt::Display for CharNgrams {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}..{}", self.min, self.max)
    }
}

/// Everything that decides how text becomes a sparse row. Stored in manifests and
/// models; two datasets or a dataset and a model are compatible only if these are
/// equal.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FeatureConfig {
    /// Scheme identifier, [`HASH_SCHEME`].
    pub scheme: String,
    /// Seed of all feature hashes.
    pub hash_seed: u64,
    /// Number of buckets is `2^log2_buckets`.
    pub log2_buckets: u32,
    /// Word n-grams up to this order (1 = unigrams only).
    pub ngrams: u32,
    /// Character n-grams inside words, if enabled.
    pub char_ngrams: Option<CharNgrams>,
    /// Keep raw summed counts (no log damping, no L2 normalisation).
    pub raw_counts: bool,
    /// Text field names, in the order the input module delivers them.
    pub text_fields: Vec<String>,
    /// Numeric field names.
    pub numeric_fields: Vec<String>,
    /// Replace every run of digits inside a token by [`DIGITS_PLACEHOLDER`]
    /// before hashing (absent in files written before it existed: off).
    #[serde(default, skip_serializing_if = "is_false")]
    pub mask_digits: bool,
    /// Replace every e-mail-like span of the text by the token
    /// [`EMAIL_PLACEHOLDER`] before tokenizing (absent in older files: off).
    #[serde(default, skip_serializing_if = "is_false")]
    pub mask_emails: bool,
}

fn is_false(b: &bool) -> bool {
    !*b
}

impl FeatureConfig {
    /// The default settings of `ingest` for one text field named `text` (TSV
    /// input): word pairs, damped and normalised counts, no character n-grams,
    /// no masks; with the given hashing seed and number of buckets.
    pub fn plain(hash_seed: u64, log2_buckets: u32) -> Self {
        FeatureConfig {
            scheme: HASH_SCHEME.into(),
            hash_seed,
            log2_buckets,
            ngrams: 2,
            char_ngrams: None,
            raw_counts: false,
            text_fields: vec!["text".into()],
            numeric_fields: vec![],
            mask_digits: false,
            mask_emails: false,
        }
    }

    /// Check ranges.
    pub fn validate(&self) -> Result<()> {
        if self.scheme != HASH_SCHEME {
            return Err(Error::Invalid(format!(
                "hashing scheme {:?} is not supported by this build (it knows {HASH_SCHEME:?})",
                self.scheme
            )));
        }
        if !LOG2_BUCKETS_RANGE.contains(&self.log2_buckets) {
            return Err(Error::Invalid(format!(
                "--log2-buckets must be in {}..={}, got {}",
                LOG2_BUCKETS_RANGE.start(),
                LOG2_BUCKETS_RANGE.end(),
                self.log2_buckets
            )));
        }
        if !NGRAMS_RANGE.contains(&self.ngrams) {
            return Err(Error::Invalid(format!(
                "--ngrams must be in {}..={}, got {}",
                NGRAMS_RANGE.start(),
                NGRAMS_RANGE.end(),
                self.ngrams
            )));
        }
        if self.text_fields.is_empty() {
            return Err(Error::Invalid("at least one text field is needed".into()));
        }
        let mut names: Vec<&String> = self
            .text_fields
            .iter()
            .chain(&self.numeric_fields)
            .collect();
        names.sort();
        if let Some(w) = names.windows(2).find(|w| w[0] == w[1]) {
            return Err(Error::Invalid(format!("field {:?} is named twice", w[0])));
        }
        Ok(())
    }

    /// Number of buckets.
    pub fn buckets(&self) -> u64 {
        1u64 << self.log2_buckets
    }

    /// The settings that differ from `other`, one `name: ours vs theirs` each
    /// (empty when equal). Compares every serialised field, so a field added
    /// later is covered too.
    pub fn differences(&self, other: &FeatureConfig) -> Vec<String> {
        let a = serde_json::to_value(self).expect("settings serialise");
        let b = serde_json::to_value(other).expect("settings serialise");
        let (Some(a), Some(b)) = (a.as_object(), b.as_object()) else {
            return Vec::new();
        };
        let mut keys: Vec<&String> = a.keys().chain(b.keys()).collect();
        keys.sort();
        keys.dedup();
        let null = serde_json::Value::Null;
        keys.into_iter()
            .filter_map(|k| {
                let (x, y) = (a.get(k).unwrap_or(&null), b.get(k).unwrap_or(&null));
                (x != y).then(|| format!("{k}: {x} vs {y}"))
            })
            .collect()
    }
}

/// Bucket and sign of a 64-bit feature hash.
#[inline]
pub fn bucket_sign(h: u64, mask: u64) -> (u32, f32) {
    let sign = if h >> 63 == 1 { -1.0 } else { 1.0 };
    ((h & mask) as u32, sign)
}

/// Seed of a text field.
pub fn field_seed(hash_seed: u64, name: &str) -> u64 {
    xxh3_64_with_seed(name.as_bytes(), hash_seed)
}

/// Hash of a numeric feature.
pub fn numeric_hash(hash_seed: u64, name: &str) -> u64 {
    xxh3_64_with_seed(name.as_bytes(), hash_seed ^ NUMERIC_SALT)
}

/// Hash of a word n-gram from its tokens' unigram hashes (`n = hashes.len() ≥ 2`).
#[inline]
pub fn ngram_hash(field_seed: u64, hashes: &[u64]) -> u64 {
    if let [a, b] = hashes {
        let mut buf = [0u8; 16];
        buf[..8].copy_from_slice(&a.to_le_bytes());
        buf[8..].copy_from_slice(&b.to_le_bytes());
        return xxh3_64_with_seed(&buf, field_seed ^ 2u64.wrapping_mul(PHI));
    }
    let mut buf = [0u8; 8 * 5];
    for (i, h) in hashes.iter().enumerate() {
        buf[8 * i..8 * i + 8].copy_from_slice(&h.to_le_bytes());
    }
    xxh3_64_with_seed(
        &buf[..8 * hashes.len()],
        field_seed ^ (hashes.len() as u64).wrapping_mul(PHI),
    )
}

/// Bytes 24..56 of xxh3's default secret: the part its path for inputs of 9
/// to 16 bytes reads.
const XXH3_SECRET_24_56: [u8; 32] = [
    0x72, 0x40, 0xa4, 0xa4, 0xb7, 0xb3, 0x67, 0x1f, 0xcb, 0x79, 0xe6, 0x4e, 0xcc, 0xc0, 0xe5, 0x78,
    0x82, 0x5a, 0xd0, 0x7d, 0xcc, 0xff, 0x72, 0x21, 0xb8, 0x08, 0x46, 0x74, 0xf7, 0x43, 0x24, 0x8e,
];

/// [`ngram_hash`] of word pairs in one field, with what depends only on the
/// field's seed worked out once: xxh3 of the 16 bytes `le(a) ‖ le(b)`, as
/// xxh3's 9-to-16-byte path computes it (a test holds it equal to the
/// library's result).
#[derive(Debug, Clone, Copy)]
struct PairHasher {
    flip1: u64,
    flip2: u64,
}

impl PairHasher {
    fn new(field_seed: u64) -> Self {
        let seed = field_seed ^ 2u64.wrapping_mul(PHI);
        let rd = |at: usize| {
            u64::from_le_bytes(
                XXH3_SECRET_24_56[at - 24..at - 16]
                    .try_into()
                    .expect("8 bytes"),
            )
        };
        PairHasher {
            flip1: (rd(24) ^ rd(32)).wrapping_add(seed),
            flip2: (rd(40) ^ rd(48)).wrapping_sub(seed),
        }
    }

    #[inline(always)]
    fn hash(self, a: u64, b: u64) -> u64 {
        let lo = a ^ self.flip1;
        let hi = b ^ self.flip2;
        let product = lo as u128 * hi as u128;
        let acc = 16u64
            .wrapping_add(lo.swap_bytes())
            .wrapping_add(hi)
            .wrapping_add(product as u64 ^ (product >> 64) as u64);
        // xxh3's avalanche.
        let x = (acc ^ (acc >> 37)).wrapping_mul(0x1656_6791_9E37_79F9);
        x ^ (x >> 32)
    }
}

/// Hash of a character n-gram of `n` characters.
#[inline]
pub fn char_ngram_hash(field_seed: u64, gram: &[u8], n: usize) -> u64 {
    xxh3_64_with_seed(gram, field_seed ^ CHAR_SALT ^ (n as u64).wrapping_mul(PHI))
}

/// ASCII classes: 0 separator, 1 keep, 2 uppercase (add 32).
static ASCII: [u8; 128] = {
    let mut t = [0u8; 128];
    let mut i = 0;
    while i < 128 {
        let c = i as u8;
        t[i] = if c.is_ascii_lowercase() || c.is_ascii_digit() {
            1
        } else if c.is_ascii_uppercase() {
            2
        } else {
            0
        };
        i += 1;
    }
    t
};

/// Decode one UTF-8 character at the start of `b` (non-empty, first byte ≥ 0x80).
/// Returns the character, or `None` for an invalid sequence, and the bytes used.
#[inline]
fn decode(b: &[u8]) -> (Option<char>, usize) {
    let lead = b[0];
    let (width, init) = match lead {
        0xC2..=0xDF => (2, (lead & 0x1F) as u32),
        0xE0..=0xEF => (3, (lead & 0x0F) as u32),
        0xF0..=0xF4 => (4, (lead & 0x07) as u32),
        _ => return (None, 1),
    };
    if b.len() < width {
        return (None, 1);
    }
    let mut cp = init;
    for &c in &b[1..width] {
        if c & 0xC0 != 0x80 {
            return (None, 1);
        }
        cp = (cp << 6) | (c & 0x3F) as u32;
    }
    // Reject overlong forms and surrogates; char::from_u32 rejects the latter.
    let min = [0, 0, 0x80, 0x800, 0x10000][width];
    if cp < min {
        return (None, 1);
    }
    match char::from_u32(cp) {
        Some(c) => (Some(c), width),
        None => (None, 1),
    }
}

/// [`ASCII`] over all 256 byte values (bytes ≥ 0x80 are 0), so that a lookup
/// needs no bounds check. Used only on text known to be ASCII.
#[cfg(any(test, not(target_arch = "x86_64")))]
static ASCII256: [u8; 256] = {
    let mut t = [0u8; 256];
    let mut i = 0;
    while i < 128 {
        t[i] = ASCII[i];
        i += 1;
    }
    t
};

/// Split `text` into lowercased tokens, calling `emit` with each token's UTF-8
/// bytes. Returns the number of invalid UTF-8 sequences met (decoded lossily as
/// separators). No allocation: `buf` is reused.
///
/// Text that is all ASCII (checked a word at a time) takes a fast path that
/// gives exactly the same tokens as the general one.
#[inline]
pub fn tokenize(text: &[u8], buf: &mut Vec<u8>, emit: impl FnMut(&[u8])) -> u32 {
    if text.is_ascii() {
        tokenize_ascii(text, buf, emit);
        0
    } else {
        tokenize_general(text, buf, emit)
    }
}

/// The tokenizer on ASCII text: runs of ASCII letters and digits, hashed from
/// the input when they hold no capital letter, else lowercased into `buf`;
/// tokens longer than [`MAX_TOKEN_BYTES`] are cut into pieces of that length.
///
/// The text is classified 64 bytes at a time into two bit masks (letter or
/// digit; capital letter), and tokens are found as runs of ones in the first,
/// so the work per byte is a few instructions for the whole block rather than a
/// table look-up and a branch per byte. [`tokenize_ascii_bytewise`] is the plain
/// byte loop it replaces; a test holds them equal.
#[inline]
fn tokenize_ascii(text: &[u8], buf: &mut Vec<u8>, mut emit: impl FnMut(&[u8])) {
    let n = text.len();
    if n == 0 {
        return;
    }
    let blocks = n.div_ceil(64);
    let block = |b: usize| classify_block(&text[64 * b..n.min(64 * b + 64)]);
    let mut b = 0;
    let (mut word, mut upper) = block(0);
    // Bit position in block `b` where the search goes on (0..=64).
    let mut pos = 0u32;
    loop {
        // The next one bit: the start of a token.
        let mut rest = if pos < 64 { word & (!0u64 << pos) } else { 0 };
        while rest == 0 {
            b += 1;
            if b == blocks {
                return;
            }
            (word, upper) = block(b);
            rest = word;
        }
        let from = rest.trailing_zeros();
        let start = 64 * b + from as usize;
        // The next zero bit after it: the end.
        let mut from = from;
        let mut capital = false;
        let mut after = !word & (!0u64 << from);
        let mut end = None;
        while after == 0 {
            capital |= upper >> from != 0;
            b += 1;
            if b == blocks {
                end = Some(n);
                break;
            }
            (word, upper) = block(b);
            after = !word;
            from = 0;
        }
        let end = match end {
            Some(e) => e,
            None => {
                let e = after.trailing_zeros();
                capital |= (upper & ((1u64 << e) - 1)) >> from != 0;
                pos = e;
                64 * b + e as usize
            }
        };
        let tok = &text[start..end];
        if !capital {
            if tok.len() <= MAX_TOKEN_BYTES {
                emit(tok);
            } else {
                tok.chunks(MAX_TOKEN_BYTES).for_each(&mut emit);
            }
        } else {
            buf.clear();
            buf.extend(tok.iter().map(u8::to_ascii_lowercase));
            buf.chunks(MAX_TOKEN_BYTES).for_each(&mut emit);
        }
        if end == n {
            return;
        }
    }
}

/// Bit masks of up to 64 ASCII bytes: bit `i` of the first is set when byte
/// `i` is a letter or a digit, of the second when it is a capital letter; bits
/// past the block are clear.
#[inline(always)]
fn classify_block(block: &[u8]) -> (u64, u64) {
    debug_assert!(block.len() <= 64);
    if block.len() == 64 {
        classify64(block.try_into().expect("64 bytes"))
    } else {
        let mut padded = [0u8; 64];
        padded[..block.len()].copy_from_slice(block);
        classify64(&padded)
    }
}

#[cfg(target_arch = "x86_64")]
#[inline(always)]
fn classify64(b: &[u8; 64]) -> (u64, u64) {
    use std::arch::x86_64::*;
    let mut word = 0u64;
    let mut upper = 0u64;
    for (i, part) in b.chunks_exact(16).enumerate() {
        // SAFETY: SSE2 is part of every x86_64 target; the load is unaligned
        // and reads exactly the 16 bytes of `part`.
        let (w, u) = unsafe {
            let v = _mm_loadu_si128(part.as_ptr() as *const __m128i);
            let between = |x: __m128i, lo: u8, hi: u8| {
                // Signed compares: ASCII bytes are non-negative.
                _mm_and_si128(
                    _mm_cmpgt_epi8(x, _mm_set1_epi8(lo as i8 - 1)),
                    _mm_cmplt_epi8(x, _mm_set1_epi8(hi as i8 + 1)),
                )
            };
            let digit = between(v, b'0', b'9');
            let up = between(v, b'A', b'Z');
            let lower = between(_mm_or_si128(v, _mm_set1_epi8(0x20)), b'a', b'z');
            (
                _mm_movemask_epi8(_mm_or_si128(digit, lower)) as u16 as u64,
                _mm_movemask_epi8(up) as u16 as u64,
            )
        };
        word |= w << (16 * i);
        upper |= u << (16 * i);
    }
    (word, upper)
}

#[cfg(not(target_arch = "x86_64"))]
#[inline]
fn classify64(b: &[u8; 64]) -> (u64, u64) {
    let mut word = 0u64;
    let mut upper = 0u64;
    for (i, &c) in b.iter().enumerate() {
        let class = ASCII256[c as usize] as u64;
        word |= ((class != 0) as u64) << i;
        upper |= (class >> 1) << i;
    }
    (word, upper)
}

/// The byte-at-a-time form of [`tokenize_ascii`], kept as its reference.
#[cfg(test)]
fn tokenize_ascii_bytewise(text: &[u8], buf: &mut Vec<u8>, mut emit: impl FnMut(&[u8])) {
    let n = text.len();
    let mut i = 0;
    loop {
        while i < n && ASCII256[text[i] as usize] == 0 {
            i += 1;
        }
        if i == n {
            return;
        }
        let s = i;
        let mut seen = 0u8;
        while i < n {
            let c = ASCII256[text[i] as usize];
            if c == 0 {
                break;
            }
            seen |= c;
            i += 1;
        }
        let tok = &text[s..i];
        if seen & 2 == 0 {
            if tok.len() <= MAX_TOKEN_BYTES {
                emit(tok);
            } else {
                tok.chunks(MAX_TOKEN_BYTES).for_each(&mut emit);
            }
        } else {
            buf.clear();
            buf.extend(tok.iter().map(u8::to_ascii_lowercase));
            buf.chunks(MAX_TOKEN_BYTES).for_each(&mut emit);
        }
    }
}

/// The tokenizer for any bytes (see [`tokenize`]).
fn tokenize_general(text: &[u8], buf: &mut Vec<u8>, mut emit: impl FnMut(&[u8])) -> u32 {
    let mut invalid = 0;
    buf.clear();
    let mut i = 0;
    let n = text.len();
    while i < n {
        let c = text[i];
        if c < 0x80 {
            match ASCII[c as usize] {
                1 if buf.is_empty() => {
                    // Fast path: a run of lowercase ASCII letters and digits is
                    // hashed straight from the input, without a copy.
                    let s = i;
                    while i < n && text[i] < 0x80 && ASCII[text[i] as usize] == 1 {
                        i += 1;
                    }
                    if i < n && (text[i] >= 0x80 || ASCII[text[i] as usize] == 2) {
                        // The token goes on with other characters: slow path.
                        buf.extend_from_slice(&text[s..i]);
                    } else {
                        for piece in text[s..i].chunks(MAX_TOKEN_BYTES) {
                            emit(piece);
                        }
                        continue;
                    }
                }
                1 => {
                    buf.push(c);
                    i += 1;
                }
                2 => {
                    buf.push(c + 32);
                    i += 1;
                }
                _ => {
                    if !buf.is_empty() {
                        emit(buf);
                        buf.clear();
                    }
                    i += 1;
                }
            }
        } else {
            let (ch, w) = decode(&text[i..]);
            i += w;
            match ch {
                Some(ch) if ch.is_alphanumeric() => {
                    let mut tmp = [0u8; 4];
                    for lc in ch.to_lowercase() {
                        buf.extend_from_slice(lc.encode_utf8(&mut tmp).as_bytes());
                    }
                }
                other => {
                    if other.is_none() {
                        invalid += 1;
                    }
                    if !buf.is_empty() {
                        emit(buf);
                        buf.clear();
                    }
                }
            }
        }
        while buf.len() >= MAX_TOKEN_BYTES {
            // Cut pathological runs (base64 blobs, long hex) at a char boundary.
            let mut cut = MAX_TOKEN_BYTES;
            while cut > 0 && cut < buf.len() && (buf[cut] & 0xC0) == 0x80 {
                cut -= 1;
            }
            if cut == 0 {
                cut = MAX_TOKEN_BYTES;
            }
            emit(&buf[..cut]);
            buf.drain(..cut);
        }
    }
    if !buf.is_empty() {
        emit(buf);
        buf.clear();
    }
    invalid
}

/// Which masks apply before hashing (see [`FeatureConfig::mask_digits`] and
/// [`FeatureConfig::mask_emails`]).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Masks {
    /// Digit runs become [`DIGITS_PLACEHOLDER`].
    pub digits: bool,
    /// E-mail-like spans become [`EMAIL_PLACEHOLDER`].
    pub emails: bool,
}

impl Masks {
    /// The masks of a feature configuration.
    pub fn of(cfg: &FeatureConfig) -> Masks {
        Masks {
            digits: cfg.mask_digits,
            emails: cfg.mask_emails,
        }
    }

    /// Whether any mask is on.
    pub fn any(self) -> bool {
        self.digits || self.emails
    }
}

/// Bytes that may form the part of an e-mail-like span left of `@`: ASCII
/// letters, digits, `.`, `_`, `%`, `+`, `-`, and any non-ASCII byte.
fn local_byte(b: u8) -> bool {
    b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'%' | b'+' | b'-') || b >= 0x80
}

/// Bytes that may form the part right of `@`: ASCII letters, digits, `.`, `-`,
/// and any non-ASCII byte.
fn domain_byte(b: u8) -> bool {
    b.is_ascii_alphanumeric() || matches!(b, b'.' | b'-') || b >= 0x80
}

/// The next e-mail-like span of `text` at or after `from`, as a byte range.
///
/// The rule (ours; a common-practice approximation, not RFC 5322): an `@` with
/// at least one local byte before it, and after it a domain of at least two
/// labels separated by dots, the last label at least two bytes long; dots and
/// hyphens at either end of the domain are not part of the span.
pub fn find_email(text: &[u8], from: usize) -> Option<std::ops::Range<usize>> {
    let mut at = from;
    while let Some(i) = memchr::memchr(b'@', &text[at..]) {
        let a = at + i;
        at = a + 1;
        let mut s = a;
        while s > 0 && local_byte(text[s - 1]) {
            s -= 1;
        }
        if s == a {
            continue;
        }
        let mut e = a + 1;
        while e < text.len() && domain_byte(text[e]) {
            e += 1;
        }
        while e > a + 1 && matches!(text[e - 1], b'.' | b'-') {
            e -= 1;
        }
        let domain = &text[a + 1..e];
        if domain.first().is_some_and(|&b| b == b'.' || b == b'-') {
            continue;
        }
        match domain.iter().rposition(|&b| b == b'.') {
            Some(d) if d > 0 && domain.len() - d > 2 => return Some(s..e),
            _ => continue,
        }
    }
    None
}

/// Whether a token holds a digit (ASCII, or any Unicode numeric character).
fn has_digit(tok: &[u8]) -> bool {
    tok.iter().any(|&b| b.is_ascii_digit())
        || (!tok.is_ascii()
            && std::str::from_utf8(tok).is_ok_and(|s| s.chars().any(char::is_numeric)))
}

/// Replace every maximal run of numeric characters of `tok` by
/// [`DIGITS_PLACEHOLDER`], writing the result into `out`.
pub fn mask_digit_runs(tok: &[u8], out: &mut Vec<u8>) {
    out.clear();
    let text = String::from_utf8_lossy(tok);
    let mut in_run = false;
    for c in text.chars() {
        if c.is_numeric() {
            if !in_run {
                out.extend_from_slice(DIGITS_PLACEHOLDER.as_bytes());
                in_run = true;
            }
        } else {
            in_run = false;
            let mut tmp = [0u8; 4];
            out.extend_from_slice(c.encode_utf8(&mut tmp).as_bytes());
        }
    }
}

/// [`tokenize`] with masks applied: e-mail-like spans are cut out of the text
/// and stand as one [`EMAIL_PLACEHOLDER`] token where they were, and digit runs
/// inside tokens become [`DIGITS_PLACEHOLDER`]. `emit` gets each token and
/// whether it is a placeholder through and through (such tokens get no
/// character n-grams). Returns the invalid UTF-8 sequences met.
pub fn tokenize_masked(
    text: &[u8],
    masks: Masks,
    buf: &mut Vec<u8>,
    masked: &mut Vec<u8>,
    mut emit: impl FnMut(&[u8], bool),
) -> u32 {
    let mut on_token = |tok: &[u8], email: bool| {
        if email {
            emit(EMAIL_PLACEHOLDER.as_bytes(), true);
        } else if masks.digits && has_digit(tok) {
            mask_digit_runs(tok, masked);
            emit(masked, masked == DIGITS_PLACEHOLDER.as_bytes());
        } else {
            emit(tok, false);
        }
    };
    if !masks.emails {
        return tokenize(text, buf, |t| on_token(t, false));
    }
    let mut invalid = 0;
    let mut pos = 0;
    while let Some(span) = find_email(text, pos) {
        invalid += tokenize(&text[pos..span.start], buf, |t| on_token(t, false));
        on_token(&[], true);
        pos = span.end;
    }
    invalid + tokenize(&text[pos..], buf, |t| on_token(t, false))
}

/// What one call to [`Featurizer::add_text`] saw.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TextStats {
    /// Tokens found.
    pub tokens: u32,
    /// Invalid UTF-8 sequences met.
    pub invalid_utf8: u32,
}

/// Turns the fields of one row into a sorted sparse vector. Holds reusable
/// buffers: create one per thread and reuse it for every row.
pub struct Featurizer {
    cfg: FeatureConfig,
    mask: u64,
    field_seeds: Vec<u64>,
    /// Word-pair hashing of each text field.
    pair_hashers: Vec<PairHasher>,
    numeric_hashes: Vec<u64>,
    token: Vec<u8>,
    masked: Vec<u8>,
    padded: Vec<u8>,
    bounds: Vec<usize>,
    recent: [u64; 5],
    /// One entry per token occurrence: `bucket << 1 | (sign is negative)`.
    text: Vec<u32>,
    numeric: Vec<(u32, f32)>,
    merged: Vec<(u32, f32)>,
    /// Scratch of [`sort_keys`].
    sorted: Vec<u32>,
    /// Buckets and values of the row being finished.
    run_buckets: Vec<u32>,
    run_values: Vec<f32>,
    run_counts: Vec<i32>,
    /// `sign(c)·ln_1p(|c|)` for counts `|c| < LN1P_TABLE`, at `c + LN1P_TABLE`.
    ln1p: [f32; 2 * LN1P_TABLE],
    /// Rows are sorted with AVX-512 when this is given (see `keysort`).
    wide_sort: Option<WideSort>,
}

/// Counts whose damped value is looked up rather than computed.
const LN1P_TABLE: usize = 64;

/// The damped value of a nonzero count: `sign(c)·ln_1p(|c|)`, where count 1
/// has always used the constant `ln 2` (which `ln_1p(1)` need not round to).
fn damped(c: i32) -> f32 {
    let a = c.unsigned_abs();
    let m = if a == 1 {
        std::f32::consts::LN_2
    } else {
        (a as f32).ln_1p()
    };
    m.copysign(c as f32)
}

/// Pack a hash into a text entry: bucket in the high bits, the sign in bit 0.
#[inline]
fn key(h: u64, mask: u64) -> u32 {
    (((h & mask) as u32) << 1) | (h >> 63) as u32
}

impl Featurizer {
    /// Build a featurizer for `cfg` (validated).
    pub fn new(cfg: &FeatureConfig) -> Result<Self> {
        cfg.validate()?;
        Ok(Featurizer {
            mask: cfg.buckets() - 1,
            field_seeds: cfg
                .text_fields
                .iter()
                .map(|f| field_seed(cfg.hash_seed, f))
                .collect(),
            pair_hashers: cfg
                .text_fields
                .iter()
                .map(|f| PairHasher::new(field_seed(cfg.hash_seed, f)))
                .collect(),
            numeric_hashes: cfg
                .numeric_fields
                .iter()
                .map(|f| numeric_hash(cfg.hash_seed, f))
                .collect(),
            cfg: cfg.clone(),
            token: Vec::with_capacity(MAX_TOKEN_BYTES + 8),
            masked: Vec::new(),
            padded: Vec::with_capacity(MAX_TOKEN_BYTES + 8),
            bounds: Vec::with_capacity(MAX_TOKEN_BYTES + 8),
            recent: [0; 5],
            text: Vec::with_capacity(256),
            numeric: Vec::with_capacity(8),
            merged: Vec::with_capacity(256),
            sorted: Vec::with_capacity(256),
            run_buckets: Vec::with_capacity(256),
            run_values: Vec::with_capacity(256),
            run_counts: Vec::with_capacity(256),
            ln1p: std::array::from_fn(|i| match i as i32 - LN1P_TABLE as i32 {
                0 => 0.0,
                c => damped(c),
            }),
            wide_sort: WideSort::detect(),
        })
    }

    /// The configuration.
    pub fn config(&self) -> &FeatureConfig {
        &self.cfg
    }

    /// Start a new row.
    pub fn begin_row(&mut self) {
        self.text.clear();
        self.numeric.clear();
    }

    /// Add the text of field number `field` (index into `text_fields`).
    pub fn add_text(&mut self, field: usize, text: &[u8]) -> TextStats {
        self.add_text_with(field, text, |_, _| {})
    }

    /// [`Featurizer::add_text`] that also calls `on_word(token, hash)` with every
    /// word token (after masking) and its unigram hash, in text order: the hook
    /// the token sketch of ingest uses. A no-op hook costs nothing.
    #[inline]
    pub fn add_text_with(
        &mut self,
        field: usize,
        text: &[u8],
        mut on_word: impl FnMut(&[u8], u64),
    ) -> TextStats {
        let seed = self.field_seeds[field];
        let mask = self.mask;
        let n = self.cfg.ngrams as usize;
        let chars = self.cfg.char_ngrams;
        let masks = Masks::of(&self.cfg);
        let mut count = 0usize;
        let Featurizer {
            token,
            masked,
            padded,
            bounds,
            recent,
            text: out,
            pair_hashers,
            ..
        } = self;
        if n == 2 && chars.is_none() && !masks.any() {
            // The default settings (words and word pairs, no masks): the
            // previous word's hash is all the state needed.
            let mut prev: Option<u64> = None;
            let pairs = pair_hashers[field];
            let invalid = tokenize(text, token, |tok| {
                let h = xxh3_64_with_seed(tok, seed);
                on_word(tok, h);
                out.push(key(h, mask));
                if let Some(p) = prev {
                    out.push(key(pairs.hash(p, h), mask));
                }
                prev = Some(h);
                count += 1;
            });
            return TextStats {
                tokens: count as u32,
                invalid_utf8: invalid,
            };
        }
        // The work per token, written once and expanded into each tokenizer's
        // closure, so the unmasked path stays one closure without a call.
        macro_rules! on_token {
            ($tok:expr, $placeholder:expr) => {{
                let tok: &[u8] = $tok;
                let h = xxh3_64_with_seed(tok, seed);
                on_word(tok, h);
                out.push(key(h, mask));
                if n > 1 {
                    // `recent` holds the previous min(count, n-1) unigram hashes,
                    // oldest first, followed by this one.
                    let have = count.min(n - 1);
                    recent[have] = h;
                    for order in 2..=have + 1 {
                        let gram = &recent[have + 1 - order..=have];
                        out.push(key(ngram_hash(seed, gram), mask));
                    }
                    if have == n - 1 {
                        recent.copy_within(1..n, 0);
                    }
                }
                if let (Some(cn), false) = (chars, $placeholder) {
                    char_grams(tok, cn, seed, mask, padded, bounds, out);
                }
                count += 1;
            }};
        }
        let invalid = if masks.any() {
            tokenize_masked(text, masks, token, masked, |tok, placeholder| {
                on_token!(tok, placeholder)
            })
        } else {
            tokenize(text, token, |tok| on_token!(tok, false))
        };
        TextStats {
            tokens: count as u32,
            invalid_utf8: invalid,
        }
    }

    /// Add the value of numeric field number `field`.
    pub fn add_numeric(&mut self, field: usize, value: f64) {
        let (b, s) = bucket_sign(self.numeric_hashes[field], self.mask);
        self.numeric.push((b, s * value as f32));
    }

    /// Whether the row so far has any feature.
    pub fn is_empty(&self) -> bool {
        self.text.is_empty() && self.numeric.iter().all(|&(_, v)| v == 0.0)
    }

    /// Finish the row: merge, damp and normalise, then append the sorted indices
    /// and values to `indices` and `values`. Returns the number of entries added.
    pub fn finish_row(&mut self, indices: &mut Vec<u32>, values: &mut Vec<f32>) -> usize {
        let start = indices.len();
        sort_keys(
            &mut self.text,
            &mut self.sorted,
            self.cfg.log2_buckets + 1,
            self.wide_sort,
        );
        let raw = self.cfg.raw_counts;
        let t = &self.text;
        let n = t.len();
        // Scratch only grows, so it is not cleared row after row.
        if self.run_buckets.len() < n {
            self.run_buckets.resize(n, 0);
            self.run_values.resize(n, 0.0);
            self.run_counts.resize(n, 0);
        }
        let rb = &mut self.run_buckets[..n];
        let rv = &mut self.run_values[..n];
        let rc = &mut self.run_counts[..n];
        // Runs of equal buckets and their signed counts, without a branch on
        // the keys: each step stores the run so far, and moves on to a new
        // run when the bucket changes.
        let sign = |k: u32| 1 - 2 * (k & 1) as i32;
        let mut runs = 0;
        if n > 0 {
            let (mut bucket, mut count) = (t[0] >> 1, sign(t[0]));
            for &k in &t[1..] {
                rb[runs] = bucket;
                rc[runs] = count;
                let new = (k >> 1 != bucket) as usize;
                runs += new;
                // The count so far, or 0 on a new bucket (an arithmetic mask).
                count = (count & (new as i32 - 1)) + sign(k);
                bucket = k >> 1;
            }
            rb[runs] = bucket;
            rc[runs] = count;
            runs += 1;
        }
        let mut norm = 0.0f32;
        let mut w = 0;
        for r in 0..runs {
            let (bucket, count) = (rb[r], rc[r]);
            // Damp, drop the counts that cancelled (a value 0 is overwritten by
            // the next bucket), and sum the squares.
            let v = if raw {
                count as f32
            } else if count.unsigned_abs() < LN1P_TABLE as u32 {
                self.ln1p[(count + LN1P_TABLE as i32) as usize]
            } else {
                damped(count)
            };
            norm += v * v;
            rb[w] = bucket;
            rv[w] = v;
            w += (count != 0) as usize;
        }
        // Normalise in the scratch row, before the copy out: scaling the copy
        // would load what a bulk copy has just stored, which waits for the
        // stores to drain.
        if !raw && norm > 0.0 {
            let inv = 1.0 / norm.sqrt();
            for v in &mut rv[..w] {
                *v *= inv;
            }
        }
        indices.extend_from_slice(&rb[..w]);
        values.extend_from_slice(&rv[..w]);
        if !self.numeric.is_empty() {
            let out = &mut self.merged;
            out.clear();
            out.extend(
                indices[start..]
                    .iter()
                    .copied()
                    .zip(values[start..].iter().copied()),
            );
            out.extend_from_slice(&self.numeric);
            merge(out);
            // Colliding numeric features could sum beyond the f32 range.
            for e in out.iter_mut() {
                e.1 = e.1.clamp(-f32::MAX, f32::MAX);
            }
            indices.truncate(start);
            values.truncate(start);
            for &(b, v) in out.iter() {
                indices.push(b);
                values.push(v);
            }
        }
        indices.len() - start
    }
}

/// Sort by bucket, sum duplicates, drop zeros.
fn merge(v: &mut Vec<(u32, f32)>) {
    v.sort_by_key(|e| e.0);
    let mut w = 0;
    for r in 0..v.len() {
        if w > 0 && v[w - 1].0 == v[r].0 {
            v[w - 1].1 += v[r].1;
        } else {
            v[w] = v[r];
            w += 1;
        }
    }
    v.truncate(w);
    v.retain(|e| e.1 != 0.0);
}

/// Character n-grams of `"<tok>"`.
fn char_grams(
    tok: &[u8],
    cn: CharNgrams,
    seed: u64,
    mask: u64,
    padded: &mut Vec<u8>,
    bounds: &mut Vec<usize>,
    out: &mut Vec<u32>,
) {
    padded.clear();
    padded.push(b'<');
    padded.extend_from_slice(tok);
    padded.push(b'>');
    bounds.clear();
    for (i, &b) in padded.iter().enumerate() {
        if b & 0xC0 != 0x80 {
            bounds.push(i);
        }
    }
    bounds.push(padded.len());
    let chars = bounds.len() - 1;
    for n in cn.min as usize..=cn.max as usize {
        if n > chars {
            break;
        }
        for s in 0..=chars - n {
            let gram = &padded[bounds[s]..bounds[s + n]];
            out.push(key(char_ngram_hash(seed, gram, n), mask));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg() -> FeatureConfig {
        FeatureConfig::plain(7, 18)
    }

    fn toks(s: &[u8]) -> (Vec<String>, u32) {
        let mut out = Vec::new();
        let mut buf = Vec::new();
        let bad = tokenize(s, &mut buf, |t| {
            out.push(String::from_utf8(t.to_vec()).unwrap())
        });
        (out, bad)
    }

    #[test]
    fn tokenizer_splits_and_lowercases() {
        assert_eq!(
            toks(b"Hello, WORLD! it's 2x-fast").0,
            ["hello", "world", "it", "s", "2x", "fast"]
        );
        assert_eq!(
            toks("Ünïcode ÉTÉ straße ΣΊΣΥΦΟΣ".as_bytes()).0,
            ["ünïcode", "été", "straße", "σίσυφοσ"]
        );
        assert_eq!(toks("日本語 テキスト".as_bytes()).0, ["日本語", "テキスト"]);
        assert_eq!(toks(b"   ...   ").0, Vec::<String>::new());
        // U+0130 (dotted capital I) lowercases to two characters.
        assert_eq!(toks("İ".as_bytes()).0, ["i\u{307}"]);
    }

    /// The ASCII fast path must give exactly the tokens of the general path.
    #[test]
    fn ascii_fast_path_matches_general_tokenizer() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let alphabet = b"abcxyzABCXYZ0129 \t.,-_!'\"()/";
        type Tokenizer = fn(&[u8], &mut Vec<u8>, &mut dyn FnMut(&[u8]));
        let run = |f: Tokenizer, text: &[u8]| {
            let mut out: Vec<Vec<u8>> = Vec::new();
            let mut buf = Vec::new();
            f(text, &mut buf, &mut |t: &[u8]| out.push(t.to_vec()));
            out
        };
        let fast: Tokenizer = |t, b, e| tokenize_ascii(t, b, e);
        let bytewise: Tokenizer = |t, b, e| tokenize_ascii_bytewise(t, b, e);
        let general: Tokenizer = |t, b, e| {
            tokenize_general(t, b, e);
        };
        let mut texts: Vec<Vec<u8>> = vec![
            b"".to_vec(),
            b"Hello, WORLD! it's 2x-fast".to_vec(),
            [b"ab".repeat(200), b"CD".repeat(100), b" x".to_vec()].concat(),
            b"A".repeat(700),
            b"q".repeat(513),
        ];
        for _ in 0..3000 {
            let len = rng.random_range(0..300);
            let mut t: Vec<u8> = (0..len)
                .map(|_| alphabet[rng.random_range(0..alphabet.len())])
                .collect();
            if rng.random_range(0..10) == 0 {
                let at = rng.random_range(0..=t.len());
                let long: Vec<u8> = (0..rng.random_range(250..600))
                    .map(|_| alphabet[rng.random_range(0..12)])
                    .collect();
                t.splice(at..at, long);
            }
            texts.push(t);
        }
        for t in &texts {
            let want = run(general, t);
            assert_eq!(run(fast, t), want, "{:?}", String::from_utf8_lossy(t));
            assert_eq!(run(bytewise, t), want, "{:?}", String::from_utf8_lossy(t));
        }
    }

    #[test]
    fn pair_hasher_is_xxh3_of_the_two_hashes() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(17);
        for i in 0..20_000u64 {
            let seed = match i % 4 {
                0 => 0,
                1 => u64::MAX,
                _ => rng.random(),
            };
            let (a, b): (u64, u64) = match i % 5 {
                0 => (0, 0),
                1 => (u64::MAX, 1),
                _ => (rng.random(), rng.random()),
            };
            assert_eq!(
                PairHasher::new(seed).hash(a, b),
                ngram_hash(seed, &[a, b]),
                "seed {seed:#x}, {a:#x}, {b:#x}"
            );
        }
    }

    #[test]
    fn invalid_utf8_separates_and_counts() {
        let (t, bad) = toks(b"ab\xffcd\xe2\x82 ef\xc0\xafgh");
        assert_eq!(t, ["ab", "cd", "ef", "gh"]);
        // One per byte that cannot start or continue a valid sequence.
        assert_eq!(bad, 5);
        // Surrogate code points encoded in UTF-8 are invalid too.
        assert_eq!(toks(b"x\xed\xa0\x80y").1, 3);
    }

    #[test]
    fn long_runs_are_cut() {
        let long = "a".repeat(1000);
        let (t, _) = toks(long.as_bytes());
        assert!(t.iter().all(|x| x.len() <= MAX_TOKEN_BYTES));
        assert_eq!(t.concat(), long);
        let long = "é".repeat(300);
        let (t, _) = toks(long.as_bytes());
        assert_eq!(t.concat(), long);
    }

    fn row(f: &mut Featurizer, text: &str) -> (Vec<u32>, Vec<f32>) {
        let (mut i, mut v) = (Vec::new(), Vec::new());
        f.begin_row();
        f.add_text(0, text.as_bytes());
        f.finish_row(&mut i, &mut v);
        (i, v)
    }

    #[test]
    fn rows_are_sorted_unit_norm_and_count_ngrams() {
        let mut f = Featurizer::new(&cfg()).unwrap();
        let (i, v) = row(&mut f, "free money free money now");
        assert!(i.windows(2).all(|w| w[0] < w[1]));
        let norm: f32 = v.iter().map(|x| x * x).sum();
        assert!((norm - 1.0).abs() < 1e-5);
        // Distinct: free, money, now, "free money", "money free", "money now" = 6
        // (barring a collision in 2^18 buckets, which does not happen for this seed).
        assert_eq!(i.len(), 6);
        let mut raw = cfg();
        raw.raw_counts = true;
        raw.ngrams = 1;
        let mut f = Featurizer::new(&raw).unwrap();
        let (i, v) = row(&mut f, "free money free money now");
        assert_eq!(i.len(), 3);
        let mut mags: Vec<f32> = v.iter().map(|x| x.abs()).collect();
        mags.sort_by(f32::total_cmp);
        assert_eq!(mags, [1.0, 2.0, 2.0]);
    }

    #[test]
    fn ngram_orders_match_definition() {
        // Order 2 takes a path of its own (the default settings); 3 the general one.
        for order in [2, 3] {
            let mut c = cfg();
            c.ngrams = order;
            c.raw_counts = true;
            let mut f = Featurizer::new(&c).unwrap();
            let (i, v) = row(&mut f, "a b c d");
            let s = field_seed(7, "text");
            let u: Vec<u64> = ["a", "b", "c", "d"]
                .iter()
                .map(|t| xxh3_64_with_seed(t.as_bytes(), s))
                .collect();
            let mut want: Vec<(u32, f32)> = u.iter().map(|&h| bucket_sign(h, f.mask)).collect();
            // Order of equal buckets does not matter for the sums.
            for n in 2..=order as usize {
                for w in u.windows(n) {
                    want.push(bucket_sign(ngram_hash(s, w), f.mask));
                }
            }
            merge(&mut want);
            assert_eq!(i, want.iter().map(|e| e.0).collect::<Vec<_>>());
            assert_eq!(v, want.iter().map(|e| e.1).collect::<Vec<_>>());
        }
    }

    #[test]
    fn char_ngrams_and_fields_and_numeric() {
        let mut c = cfg();
        c.ngrams = 1;
        c.raw_counts = true;
        c.char_ngrams = Some("3..3".parse().unwrap());
        c.text_fields = vec!["subject".into(), "body".into()];
        c.numeric_fields = vec!["age".into()];
        let mut f = Featurizer::new(&c).unwrap();
        let (mut i, mut v) = (Vec::new(), Vec::new());
        f.begin_row();
        f.add_text(0, b"hey");
        f.finish_row(&mut i, &mut v);
        // "<hey>" has 3 trigrams, plus the unigram.
        assert_eq!(i.len(), 4);
        let (mut i2, mut v2) = (Vec::new(), Vec::new());
        f.begin_row();
        f.add_text(1, b"hey");
        f.add_numeric(0, 2.5);
        f.finish_row(&mut i2, &mut v2);
        assert_eq!(i2.len(), 5);
        assert_ne!(i, i2[..4].to_vec(), "fields must hash apart");
        assert!(v2.iter().any(|x| x.abs() == 2.5));
    }

    #[test]
    fn config_validation() {
        let mut c = cfg();
        c.log2_buckets = 9;
        assert!(Featurizer::new(&c).is_err());
        c.log2_buckets = 29;
        assert!(Featurizer::new(&c).is_err());
        let mut c = cfg();
        c.numeric_fields = vec!["text".into()];
        assert!(c.validate().is_err());
        assert!("5..3".parse::<CharNgrams>().is_err());
        assert!("0..3".parse::<CharNgrams>().is_err());
        assert_eq!("2..4".parse::<CharNgrams>().unwrap().to_string(), "2..4");
    }

    fn masked(s: &str, digits: bool, emails: bool) -> Vec<(String, bool)> {
        let mut out = Vec::new();
        let (mut buf, mut m) = (Vec::new(), Vec::new());
        tokenize_masked(
            s.as_bytes(),
            Masks { digits, emails },
            &mut buf,
            &mut m,
            |t, p| out.push((String::from_utf8(t.to_vec()).unwrap(), p)),
        );
        out
    }

    fn words(v: Vec<(String, bool)>) -> Vec<String> {
        v.into_iter().map(|x| x.0).collect()
    }

    #[test]
    fn digit_runs_become_one_placeholder() {
        assert_eq!(
            masked("Order 12345 ref AB12cd3 x2", true, false),
            [
                ("order".to_string(), false),
                ("#".into(), true),
                ("ref".into(), false),
                ("ab#cd#".into(), false),
                ("x#".into(), false)
            ]
        );
        // Unicode numerics (Arabic-Indic digits, superscripts) are digits too.
        assert_eq!(words(masked("٣٤ km² 1½", true, false)), ["#", "km#", "#"]);
        // Off: untouched.
        assert_eq!(words(masked("ab12", false, false)), ["ab12"]);
    }

    #[test]
    fn email_like_spans_become_one_placeholder() {
        assert_eq!(
            words(masked(
                "write to Anna.Berg+ferry@quillmere-coop.example, or a@b.cd.",
                false,
                true
            )),
            ["write", "to", "@email", "or", "@email"]
        );
        // Not e-mail-like: no local part, no dot in the domain, a one-letter
        // top-level label, a domain starting with a dot.
        assert_eq!(
            words(masked(
                "@home x@localhost y@site.c z@.example.org",
                false,
                true
            )),
            [
                "home",
                "x",
                "localhost",
                "y",
                "site",
                "c",
                "z",
                "example",
                "org"
            ]
        );
        assert_eq!(find_email(b"mail me: jo@ex.org.", 0), Some(9..18));
        // The placeholder gets no character n-grams; both masks together.
        assert_eq!(
            masked("call 0123 or jo99@ex.org", true, true),
            [
                ("call".to_string(), false),
                ("#".into(), true),
                ("or".into(), false),
                ("@email".into(), true)
            ]
        );
    }

    #[test]
    fn masks_are_stored_only_when_on_and_change_the_row() {
        let c = cfg();
        let json = serde_json::to_string(&c).unwrap();
        assert!(!json.contains("mask"), "{json}");
        let back: FeatureConfig = serde_json::from_str(&json).unwrap();
        assert_eq!(back, c);
        let mut m = cfg();
        m.mask_digits = true;
        assert!(serde_json::to_string(&m)
            .unwrap()
            .contains("\"mask_digits\":true"));
        let mut plain = Featurizer::new(&c).unwrap();
        let mut masking = Featurizer::new(&m).unwrap();
        // Different numbers hash alike under the mask, apart without it.
        assert_eq!(
            row(&mut masking, "ticket 1234"),
            row(&mut masking, "ticket 98")
        );
        assert_ne!(row(&mut plain, "ticket 1234"), row(&mut plain, "ticket 98"));
        // Text without digits hashes the same either way.
        assert_eq!(
            row(&mut masking, "ferry late"),
            row(&mut plain, "ferry late")
        );
    }
}
