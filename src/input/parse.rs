//! Field extraction from the records of a chunk, and bad-line accounting.

use std::borrow::Cow;
use std::fmt;

use serde::de::{self, DeserializeSeed, IgnoredAny, MapAccess, Visitor};
use serde::{Deserialize, Serialize};

use super::{Chunk, Format, InputSpec};
use crate::error::{Error, Result};

/// Most text (or numeric) fields a record may name.
pub const MAX_FIELDS: usize = 32;

/// Why a record was skipped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BadReason {
    /// TSV line without a tab between label and text.
    NoTab,
    /// CSV record that breaks RFC 4180 quoting or has the wrong number of fields.
    BadCsv,
    /// JSON Lines line that is not a JSON object.
    BadJson,
    /// Label or all text fields missing or empty.
    MissingField,
    /// A numeric field that is not a finite number.
    BadNumber,
    /// A record containing NUL bytes.
    NulByte,
    /// A record whose text gives no feature at all.
    EmptyText,
    /// A record longer than `--max-line-bytes`.
    TooLong,
}

impl BadReason {
    /// Every reason, in report order.
    pub const ALL: [BadReason; 8] = [
        BadReason::NoTab,
        BadReason::BadCsv,
        BadReason::BadJson,
        BadReason::MissingField,
        BadReason::BadNumber,
        BadReason::NulByte,
        BadReason::EmptyText,
        BadReason::TooLong,
    ];

    /// Stable key used in JSON and summaries.
    pub fn key(self) -> &'static str {
        match self {
            BadReason::NoTab => "no_tab",
            BadReason::BadCsv => "bad_csv",
            BadReason::BadJson => "bad_json",
            BadReason::MissingField => "missing_field",
            BadReason::BadNumber => "bad_number",
            BadReason::NulByte => "nul_byte",
            BadReason::EmptyText => "empty_text",
            BadReason::TooLong => "too_long",
        }
    }

    /// Position in [`BadReason::ALL`].
    pub fn index(self) -> usize {
        self as usize
    }
}

impl fmt::Display for BadReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.key())
    }
}

/// One skipped record.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BadLine {
    /// Why.
    pub reason: BadReason,
    /// 1-based line number where the record starts.
    pub line: u64,
    /// Details for the message.
    pub detail: String,
}

/// Whether records must carry a label.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LabelMode {
    /// Training data: a record without a label is bad.
    Required,
    /// Scoring: a label is read if present and may be absent.
    Optional,
}

/// The fields of one good record.
#[derive(Debug)]
pub struct Fields<'a> {
    /// 1-based line where the record starts.
    pub line: u64,
    /// The label, if present.
    pub label: Option<Cow<'a, str>>,
    /// The texts, one per configured text field (empty when absent).
    pub texts: &'a [&'a [u8]],
    /// The numbers, one per configured numeric field (`None` when absent).
    pub numbers: &'a [Option<f64>],
    /// The record's bytes (without line ending), hashed for the validation split.
    pub raw: &'a [u8],
    /// Whether invalid UTF-8 was replaced while reading the record.
    pub lossy: bool,
}

/// Positions of the wanted CSV columns, read from an input's header row.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Columns {
    label: Option<usize>,
    text: Vec<usize>,
    numeric: Vec<usize>,
    width: usize,
}

impl Columns {
    /// Find the spec's columns in a header record. A missing label column is only
    /// an error when `label_required`... it is always looked up; see
    /// [`Columns::from_header_mode`].
    pub fn from_header(header: &[u8], spec: &InputSpec, name: &str) -> Result<Columns> {
        Self::from_header_mode(header, spec, name, true)
    }

    /// As [`Columns::from_header`]; with `label_required` false a missing label
    /// column is allowed (scoring).
    pub fn from_header_mode(
        header: &[u8],
        spec: &InputSpec,
        name: &str,
        label_required: bool,
    ) -> Result<Columns> {
        let mut r = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(header);
        let mut rec = csv::ByteRecord::new();
        let ok = r
            .read_byte_record(&mut rec)
            .map_err(|e| Error::Invalid(format!("{name}: bad CSV header: {e}")))?;
        if !ok {
            return Err(Error::Invalid(format!("{name}: no CSV header row")));
        }
        let names: Vec<String> = rec
            .iter()
            .map(|f| String::from_utf8_lossy(f).trim().to_string())
            .collect();
        let find = |want: &str| names.iter().position(|n| n == want);
        let missing = |want: &str| {
            Error::Invalid(format!(
                "{name}: CSV header has no column {want:?} (columns: {})",
                names.join(", ")
            ))
        };
        let label = match find(&spec.label) {
            Some(i) => Some(i),
            None if label_required => return Err(missing(&spec.label)),
            None => None,
        };
        let lookup = |list: &[String]| -> Result<Vec<usize>> {
            list.iter()
                .map(|w| find(w).ok_or_else(|| missing(w)))
                .collect()
        };
        Ok(Columns {
            label,
            text: lookup(&spec.text)?,
            numeric: lookup(&spec.numeric)?,
            width: names.len(),
        })
    }
}

/// Reusable buffers for [`parse_chunk`]; one per thread.
#[derive(Default)]
pub struct ParseScratch {
    json: JsonRow,
    lossy: String,
}

/// Counts of what a chunk held besides good and bad records.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct ChunkCounts {
    /// Blank lines skipped (not counted as bad).
    pub blank: u64,
}

fn trim_cr(line: &[u8]) -> &[u8] {
    line.strip_suffix(b"\r").unwrap_or(line)
}

fn is_blank(line: &[u8]) -> bool {
    line.iter().all(|b| b.is_ascii_whitespace())
}

fn label_of(b: &[u8]) -> Cow<'_, str> {
    let b = b.trim_ascii();
    // The same as the lossy conversion alone, which is slower on valid text.
    match std::str::from_utf8(b) {
        Ok(s) => Cow::Borrowed(s),
        Err(_) => String::from_utf8_lossy(b),
    }
}

/// Parse the records of `chunk`, calling `good` for each usable record and
/// `bad` for each skipped one, in input order. Returns the blank-line count.
pub fn parse_chunk(
    chunk: &Chunk,
    spec: &InputSpec,
    mode: LabelMode,
    scratch: &mut ParseScratch,
    mut good: impl FnMut(&Fields<'_>),
    mut bad: impl FnMut(BadLine),
) -> ChunkCounts {
    let mut counts = ChunkCounts::default();
    if let Some(reason) = chunk.skipped {
        bad(BadLine {
            reason,
            line: chunk.first_line,
            detail: match reason {
                BadReason::BadCsv => "unterminated quoted field".into(),
                _ => format!(
                    "record longer than --max-line-bytes {}",
                    spec.max_line_bytes
                ),
            },
        });
        return counts;
    }
    match spec.format {
        Format::Tsv | Format::Jsonl => {
            let mut line_no = chunk.first_line;
            let data = &chunk.data[..];
            let mut start = 0;
            while start < data.len() {
                let end = memchr::memchr(b'\n', &data[start..]).map_or(data.len(), |p| start + p);
                let line = trim_cr(&data[start..end]);
                start = end + 1;
                let n = line_no;
                line_no += 1;
                if line.len() > spec.max_line_bytes {
                    bad(BadLine {
                        reason: BadReason::TooLong,
                        line: n,
                        detail: format!(
                            "{} bytes > --max-line-bytes {}",
                            line.len(),
                            spec.max_line_bytes
                        ),
                    });
                    continue;
                }
                if is_blank(line) {
                    counts.blank += 1;
                    continue;
                }
                if memchr::memchr(0, line).is_some() {
                    bad(BadLine {
                        reason: BadReason::NulByte,
                        line: n,
                        detail: "line contains NUL bytes".into(),
                    });
                    continue;
                }
                let r = if spec.format == Format::Tsv {
                    tsv_line(line, n, mode, &mut good)
                } else {
                    json_line(line, n, spec, mode, scratch, &mut good)
                };
                if let Err(b) = r {
                    bad(b);
                }
            }
        }
        Format::Csv => csv_records(chunk, spec, mode, &mut good, &mut bad, &mut counts),
    }
    counts
}

fn missing(line: u64, what: &str) -> BadLine {
    BadLine {
        reason: BadReason::MissingField,
        line,
        detail: what.to_string(),
    }
}

fn tsv_line(
    line: &[u8],
    n: u64,
    mode: LabelMode,
    good: &mut impl FnMut(&Fields<'_>),
) -> Result<(), BadLine> {
    let (label, text) = match memchr::memchr(b'\t', line) {
        Some(t) => (Some(label_of(&line[..t])), &line[t + 1..]),
        None if mode == LabelMode::Required => {
            return Err(BadLine {
                reason: BadReason::NoTab,
                line: n,
                detail: "no tab between label and text".into(),
            })
        }
        None => (None, line),
    };
    if mode == LabelMode::Required && label.as_deref().is_none_or(str::is_empty) {
        return Err(missing(n, "empty label"));
    }
    let lossy = matches!(label, Some(Cow::Owned(_)));
    good(&Fields {
        line: n,
        label,
        texts: &[text],
        numbers: &[],
        raw: line,
        lossy,
    });
    Ok(())
}

fn parse_number(b: &[u8]) -> Option<f64> {
    let s = std::str::from_utf8(b).ok()?.trim();
    if s.is_empty() {
        return None;
    }
    // Values are stored as f32: anything beyond its range is refused, not
    // turned into an infinity.
    s.parse::<f64>()
        .ok()
        .filter(|v| v.is_finite() && v.abs() <= f32::MAX as f64)
}

/// Whether a raw CSV record follows RFC 4180 quoting: a field is either free of
/// quotes, or enclosed in quotes with inner quotes doubled.
fn rfc4180_ok(raw: &[u8]) -> bool {
    let mut i = 0;
    let n = raw.len();
    loop {
        // At the start of a field.
        if i < n && raw[i] == b'"' {
            i += 1;
            loop {
                match memchr::memchr(b'"', &raw[i..]) {
                    None => return false,
                    Some(p) => {
                        i += p + 1;
                        if i < n && raw[i] == b'"' {
                            i += 1;
                            continue;
                        }
                        break;
                    }
                }
            }
            // After the closing quote: a delimiter or the end of the record.
            let rest = &raw[i..];
            if rest.is_empty() || rest == b"\r" || rest == b"\n" || rest == b"\r\n" {
                return true;
            }
            if raw[i] != b',' {
                return false;
            }
            i += 1;
        } else {
            let end = memchr::memchr(b',', &raw[i..]).map_or(n, |p| i + p);
            if memchr::memchr(b'"', &raw[i..end]).is_some() {
                return false;
            }
            if end == n {
                return true;
            }
            i = end + 1;
        }
    }
}

/// Blank lines in a run of CR and LF bytes before a record; `after_cr` says the
/// byte before the run was a CR, so a leading LF completes that CRLF.
fn blank_lines(run: &[u8], after_cr: bool) -> u64 {
    let n = run.iter().filter(|&&b| b == b'\n').count() as u64;
    if after_cr && run.first() == Some(&b'\n') {
        n - 1
    } else {
        n
    }
}

fn csv_records(
    chunk: &Chunk,
    spec: &InputSpec,
    mode: LabelMode,
    good: &mut impl FnMut(&Fields<'_>),
    bad: &mut impl FnMut(BadLine),
    counts: &mut ChunkCounts,
) {
    let Some(cols) = chunk.columns.as_deref() else {
        return;
    };
    let data = &chunk.data[..];
    let mut r = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(data);
    let mut rec = csv::ByteRecord::new();
    let mut numbers = [None; MAX_FIELDS];
    // Line numbers are counted here from the bytes (the reader's own count lags
    // behind after a CRLF ending): `line_at` is the line of byte `counted`.
    let mut counted = 0usize;
    let mut line_at = chunk.first_line;
    loop {
        let start = (r.position().byte() as usize).min(data.len());
        let more = match r.read_byte_record(&mut rec) {
            Ok(m) => m,
            Err(e) => {
                line_at += memchr::memchr_iter(b'\n', &data[counted..start]).count() as u64;
                bad(BadLine {
                    reason: BadReason::BadCsv,
                    line: line_at,
                    detail: e.to_string(),
                });
                // The reader cannot resume reliably after an error.
                return;
            }
        };
        if !more {
            // Blank lines at the end of the chunk.
            let tail = &data[start.max(counted)..];
            counts.blank += blank_lines(tail, start > 0 && data[start - 1] == b'\r');
            return;
        }
        let end = (r.position().byte() as usize).min(data.len());
        let whole = &data[start..end];
        // The reader skips blank lines before a record; the LF of a CRLF that
        // ended the previous record may also lead the range.
        let lead = whole
            .iter()
            .take_while(|&&b| b == b'\n' || b == b'\r')
            .count();
        counts.blank += blank_lines(&whole[..lead], start > 0 && data[start - 1] == b'\r');
        let content = start + lead;
        line_at += memchr::memchr_iter(b'\n', &data[counted..content]).count() as u64;
        counted = content;
        let line = line_at;
        let raw = trim_cr(
            data[content..end]
                .strip_suffix(b"\n")
                .unwrap_or(&data[content..end]),
        )
        .trim_ascii_start();

        if raw.len() > spec.max_line_bytes {
            bad(BadLine {
                reason: BadReason::TooLong,
                line,
                detail: format!(
                    "{} bytes > --max-line-bytes {}",
                    raw.len(),
                    spec.max_line_bytes
                ),
            });
            continue;
        }
        if memchr::memchr(0, raw).is_some() {
            bad(BadLine {
                reason: BadReason::NulByte,
                line,
                detail: "record contains NUL bytes".into(),
            });
            continue;
        }
        if !rfc4180_ok(raw) {
            bad(BadLine {
                reason: BadReason::BadCsv,
                line,
                detail: "quotes must enclose a whole field, with inner quotes doubled".into(),
            });
            continue;
        }
        if rec.len() != cols.width {
            bad(BadLine {
                reason: BadReason::BadCsv,
                line,
                detail: format!("{} fields, the header has {}", rec.len(), cols.width),
            });
            continue;
        }
        let label = cols.label.and_then(|i| rec.get(i)).map(label_of);
        if mode == LabelMode::Required && label.as_deref().is_none_or(str::is_empty) {
            bad(missing(line, "empty label"));
            continue;
        }
        let mut any_text = false;
        let mut texts: [&[u8]; MAX_FIELDS] = [&[]; MAX_FIELDS];
        for (slot, &i) in texts.iter_mut().zip(&cols.text) {
            *slot = rec.get(i).unwrap_or(&[]);
            any_text |= !slot.is_empty();
        }
        if !any_text {
            bad(missing(line, "all text columns are empty"));
            continue;
        }
        let mut bad_num = None;
        for (slot, &i) in numbers.iter_mut().zip(&cols.numeric) {
            let f = rec.get(i).unwrap_or(&[]);
            *slot = if f.trim_ascii().is_empty() {
                None
            } else {
                match parse_number(f) {
                    Some(v) => Some(v),
                    None => {
                        bad_num = Some(String::from_utf8_lossy(f).into_owned());
                        None
                    }
                }
            };
        }
        if let Some(v) = bad_num {
            bad(BadLine {
                reason: BadReason::BadNumber,
                line,
                detail: format!("not a finite number: {v:?}"),
            });
            continue;
        }
        let lossy = matches!(label, Some(Cow::Owned(_)));
        good(&Fields {
            line,
            label,
            texts: &texts[..cols.text.len()],
            numbers: &numbers[..cols.numeric.len()],
            raw,
            lossy,
        });
    }
}

/// Wanted values of one JSON line, in reusable buffers.
#[derive(Default)]
struct JsonRow {
    label: Option<String>,
    texts: Vec<Option<String>>,
    numbers: Vec<Option<f64>>,
    bad_number: Option<String>,
}

struct RowSeed<'s> {
    row: &'s mut JsonRow,
    spec: &'s InputSpec,
}

enum Key {
    Label,
    Text(usize),
    Number(usize),
    Other,
}

struct KeySeed<'s>(&'s InputSpec);

impl<'de> DeserializeSeed<'de> for KeySeed<'_> {
    type Value = Key;
    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<Key, D::Error> {
        d.deserialize_str(self)
    }
}

impl Visitor<'_> for KeySeed<'_> {
    type Value = Key;
    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a field name")
    }
    fn visit_str<E: de::Error>(self, k: &str) -> Result<Key, E> {
        if k == self.0.label {
            return Ok(Key::Label);
        }
        if let Some(i) = self.0.text.iter().position(|t| t == k) {
            return Ok(Key::Text(i));
        }
        if let Some(i) = self.0.numeric.iter().position(|t| t == k) {
            return Ok(Key::Number(i));
        }
        Ok(Key::Other)
    }
}

/// A JSON scalar as text (labels and texts) or as a number.
enum Scalar {
    Text(String),
    Number(f64, String),
    Null,
    Other(&'static str),
}

struct ScalarSeed;

impl<'de> DeserializeSeed<'de> for ScalarSeed {
    type Value = Scalar;
    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<Scalar, D::Error> {
        d.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for ScalarSeed {
    type Value = Scalar;
    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a string, number, boolean or null")
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<Scalar, E> {
        Ok(Scalar::Text(v.to_string()))
    }
    fn visit_string<E: de::Error>(self, v: String) -> Result<Scalar, E> {
        Ok(Scalar::Text(v))
    }
    fn visit_bool<E: de::Error>(self, v: bool) -> Result<Scalar, E> {
        Ok(Scalar::Text(v.to_string()))
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Scalar, E> {
        Ok(Scalar::Number(v as f64, v.to_string()))
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Scalar, E> {
        Ok(Scalar::Number(v as f64, v.to_string()))
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Scalar, E> {
        Ok(Scalar::Number(v, v.to_string()))
    }
    fn visit_unit<E: de::Error>(self) -> Result<Scalar, E> {
        Ok(Scalar::Null)
    }
    fn visit_seq<A: de::SeqAccess<'de>>(self, mut a: A) -> Result<Scalar, A::Error> {
        while a.next_element::<IgnoredAny>()?.is_some() {}
        Ok(Scalar::Other("an array"))
    }
    fn visit_map<A: MapAccess<'de>>(self, mut a: A) -> Result<Scalar, A::Error> {
        while a.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
        Ok(Scalar::Other("an object"))
    }
}

impl<'de> DeserializeSeed<'de> for RowSeed<'_> {
    type Value = ();
    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        d.deserialize_map(self)
    }
}

impl<'de> Visitor<'de> for RowSeed<'_> {
    type Value = ();
    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a JSON object")
    }
    fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<(), A::Error> {
        while let Some(k) = m.next_key_seed(KeySeed(self.spec))? {
            match k {
                Key::Other => {
                    m.next_value::<IgnoredAny>()?;
                }
                Key::Label => {
                    self.row.label = match m.next_value_seed(ScalarSeed)? {
                        Scalar::Text(s) | Scalar::Number(_, s) => Some(s),
                        Scalar::Null => None,
                        Scalar::Other(what) => {
                            return Err(de::Error::custom(format!(
                                "label field {:?} holds {what}",
                                self.spec.label
                            )))
                        }
                    }
                }
                Key::Text(i) => {
                    self.row.texts[i] = match m.next_value_seed(ScalarSeed)? {
                        Scalar::Text(s) | Scalar::Number(_, s) => Some(s),
                        Scalar::Null => None,
                        Scalar::Other(what) => {
                            return Err(de::Error::custom(format!(
                                "text field {:?} holds {what}",
                                self.spec.text[i]
                            )))
                        }
                    }
                }
                Key::Number(i) => {
                    self.row.numbers[i] = match m.next_value_seed(ScalarSeed)? {
                        Scalar::Number(v, _) if v.is_finite() && v.abs() <= f32::MAX as f64 => {
                            Some(v)
                        }
                        Scalar::Text(s) => match parse_number(s.as_bytes()) {
                            Some(v) => Some(v),
                            None => {
                                self.row.bad_number =
                                    Some(format!("{}={s:?}", self.spec.numeric[i]));
                                None
                            }
                        },
                        Scalar::Null => None,
                        Scalar::Number(v, _) => {
                            self.row.bad_number = Some(format!("{}={v}", self.spec.numeric[i]));
                            None
                        }
                        Scalar::Other(what) => {
                            self.row.bad_number =
                                Some(format!("{} holds {what}", self.spec.numeric[i]));
                            None
                        }
                    }
                }
            }
        }
        Ok(())
    }
}

fn json_line(
    line: &[u8],
    n: u64,
    spec: &InputSpec,
    mode: LabelMode,
    scratch: &mut ParseScratch,
    good: &mut impl FnMut(&Fields<'_>),
) -> Result<(), BadLine> {
    let (text, lossy): (&str, bool) = match std::str::from_utf8(line) {
        Ok(s) => (s, false),
        Err(_) => {
            scratch.lossy.clear();
            scratch.lossy.push_str(&String::from_utf8_lossy(line));
            (scratch.lossy.as_str(), true)
        }
    };
    let row = &mut scratch.json;
    row.label = None;
    row.texts.clear();
    row.texts.resize(spec.text.len(), None);
    row.numbers.clear();
    row.numbers.resize(spec.numeric.len(), None);
    row.bad_number = None;
    let mut de = serde_json::Deserializer::from_str(text);
    let r = RowSeed {
        row: &mut *row,
        spec,
    }
    .deserialize(&mut de)
    .and_then(|()| de.end());
    if let Err(e) = r {
        return Err(BadLine {
            reason: BadReason::BadJson,
            line: n,
            detail: e.to_string(),
        });
    }
    if let Some(v) = row.bad_number.take() {
        return Err(BadLine {
            reason: BadReason::BadNumber,
            line: n,
            detail: format!("not a finite number: {v}"),
        });
    }
    let label = row.label.as_deref().map(str::trim);
    if mode == LabelMode::Required && label.is_none_or(str::is_empty) {
        return Err(missing(
            n,
            &format!("label field {:?} is missing or empty", spec.label),
        ));
    }
    if row
        .texts
        .iter()
        .all(|t| t.as_deref().is_none_or(str::is_empty))
    {
        return Err(missing(n, "every text field is missing or empty"));
    }
    let mut texts: [&[u8]; MAX_FIELDS] = [&[]; MAX_FIELDS];
    for (slot, t) in texts.iter_mut().zip(&row.texts) {
        *slot = t.as_deref().map_or(&[][..], str::as_bytes);
    }
    good(&Fields {
        line: n,
        label: label.map(Cow::Borrowed),
        texts: &texts[..spec.text.len()],
        numbers: &row.numbers,
        raw: line,
        lossy,
    });
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Arc;

    #[derive(Debug, PartialEq)]
    struct Got {
        line: u64,
        label: Option<String>,
        texts: Vec<String>,
        numbers: Vec<Option<f64>>,
    }

    fn run(
        data: &[u8],
        spec: &InputSpec,
        mode: LabelMode,
        cols: Option<Columns>,
    ) -> (Vec<Got>, Vec<BadLine>, ChunkCounts) {
        let chunk = Chunk {
            input: 0,
            seq: 0,
            first_line: 1,
            data: data.to_vec(),
            skipped: None,
            columns: cols.map(Arc::new),
        };
        let (mut g, mut b) = (Vec::new(), Vec::new());
        let c = parse_chunk(
            &chunk,
            spec,
            mode,
            &mut ParseScratch::default(),
            |f| {
                g.push(Got {
                    line: f.line,
                    label: f.label.as_deref().map(String::from),
                    texts: f
                        .texts
                        .iter()
                        .map(|t| String::from_utf8_lossy(t).into_owned())
                        .collect(),
                    numbers: f.numbers.to_vec(),
                })
            },
            |x| b.push(x),
        );
        (g, b, c)
    }

    fn csv_spec(text: &[&str], numeric: &[&str]) -> InputSpec {
        InputSpec {
            format: Format::Csv,
            label: "label".into(),
            text: text.iter().map(|s| s.to_string()).collect(),
            numeric: numeric.iter().map(|s| s.to_string()).collect(),
            max_line_bytes: 1 << 20,
        }
    }

    #[test]
    fn tsv_first_tab_splits() {
        let spec = InputSpec::tsv(100);
        let (g, b, c) = run(
            b"spam\tbuy\tnow\r\n\nham\thello\nnotab\n\tno label\nx\tnul\0here\n",
            &spec,
            LabelMode::Required,
            None,
        );
        assert_eq!(g.len(), 2);
        assert_eq!(g[0].texts, ["buy\tnow"]);
        assert_eq!((g[1].line, g[1].label.as_deref()), (3, Some("ham")));
        let reasons: Vec<(BadReason, u64)> = b.iter().map(|x| (x.reason, x.line)).collect();
        assert_eq!(
            reasons,
            [
                (BadReason::NoTab, 4),
                (BadReason::MissingField, 5),
                (BadReason::NulByte, 6)
            ]
        );
        assert_eq!(c.blank, 1);
        // Scoring: no tab means the whole line is text.
        let (g, b, _) = run(b"just text\n", &spec, LabelMode::Optional, None);
        assert!(b.is_empty());
        assert_eq!(
            (g[0].label.clone(), g[0].texts.clone()),
            (None, vec!["just text".to_string()])
        );
    }

    #[test]
    fn tsv_too_long() {
        let (g, b, _) = run(
            b"a\tshort\nb\tthis line is long\n",
            &InputSpec::tsv(10),
            LabelMode::Required,
            None,
        );
        assert_eq!(g.len(), 1);
        assert_eq!((b[0].reason, b[0].line), (BadReason::TooLong, 2));
    }

    // RFC 4180, section 2: fields with commas, quotes and line breaks must be
    // enclosed in double quotes; a quote inside a quoted field is doubled; CRLF
    // ends a record.
    #[test]
    fn csv_rfc4180_cases() {
        let spec = csv_spec(&["subject", "body"], &[]);
        let header = b"label,subject,body\r\n";
        let cols = Columns::from_header(header, &spec, "t").unwrap();
        let data = b"spam,\"cheap, fast\",\"say \"\"hi\"\"\"\r\nham,\"two\r\nlines\",body\r\nham,plain,x\r\n";
        let (g, b, _) = run(data, &spec, LabelMode::Required, Some(cols.clone()));
        assert!(b.is_empty(), "{b:?}");
        assert_eq!(g[0].texts, ["cheap, fast", "say \"hi\""]);
        assert_eq!(g[1].texts, ["two\r\nlines", "body"]);
        assert_eq!(g[1].line, 2);
        assert_eq!(g[2].line, 4);
        // Bad quoting, wrong field counts, empty label.
        let data = b"spam,ab\"c,x\nspam,\"ab\"c,x\nham,only\nham,a,b,c\n,a,b\n";
        let (g, b, _) = run(data, &spec, LabelMode::Required, Some(cols));
        assert!(g.is_empty());
        let reasons: Vec<(BadReason, u64)> = b.iter().map(|x| (x.reason, x.line)).collect();
        assert_eq!(
            reasons,
            [
                (BadReason::BadCsv, 1),
                (BadReason::BadCsv, 2),
                (BadReason::BadCsv, 3),
                (BadReason::BadCsv, 4),
                (BadReason::MissingField, 5)
            ]
        );
    }

    #[test]
    fn csv_header_errors_and_numbers() {
        let spec = csv_spec(&["body"], &["score"]);
        let e = Columns::from_header(b"label,text\n", &spec, "in.csv").unwrap_err();
        assert!(e.to_string().contains("no column \"body\""), "{e}");
        let cols = Columns::from_header(b"score,body,label\n", &spec, "t").unwrap();
        let (g, b, _) = run(
            b"1.5,hi,a\n,hi,b\nabc,hi,c\n",
            &spec,
            LabelMode::Required,
            Some(cols),
        );
        assert_eq!(g[0].numbers, [Some(1.5)]);
        assert_eq!(g[1].numbers, [None]);
        assert_eq!(b[0].reason, BadReason::BadNumber);
    }

    #[test]
    fn rfc4180_validator() {
        for ok in [
            &b"a,b"[..],
            b"\"a,b\",c",
            b"\"\"",
            b"\"a\"\"b\"",
            b",,",
            b"\"x\"\r\n",
            b"",
        ] {
            assert!(rfc4180_ok(ok), "{:?}", String::from_utf8_lossy(ok));
        }
        for bad in [&b"a\"b"[..], b"\"a\"b", b"\"open", b"x,\"y\"z"] {
            assert!(!rfc4180_ok(bad), "{:?}", String::from_utf8_lossy(bad));
        }
    }

    fn json_spec() -> InputSpec {
        InputSpec {
            format: Format::Jsonl,
            label: "tag".into(),
            text: vec!["subject".into(), "body".into()],
            numeric: vec!["n".into()],
            max_line_bytes: 1 << 20,
        }
    }

    // RFC 8259 section 7: \uXXXX escapes, and characters outside the BMP as a
    // UTF-16 surrogate pair (the RFC's own example: G clef U+1D11E = "\uD834\uDD1E").
    #[test]
    fn json_escapes_rfc8259() {
        let spec = json_spec();
        let data = br#"{"tag":"spam","subject":"caf\u00e9 \"quoted\" \\ \/ \t","body":"\uD834\uDD1E clef","n":2}"#;
        let (g, b, _) = run(data, &spec, LabelMode::Required, None);
        assert!(b.is_empty(), "{b:?}");
        assert_eq!(g[0].texts, ["café \"quoted\" \\ / \t", "\u{1D11E} clef"]);
        assert_eq!(g[0].numbers, [Some(2.0)]);
    }

    #[test]
    fn json_fields_and_errors() {
        let spec = json_spec();
        let data = concat!(
            "{\"tag\":1,\"body\":\"x\",\"other\":{\"deep\":[1,2]}}\n",
            "{\"tag\":true,\"subject\":\"y\",\"n\":\"3.5\"}\n",
            "not json\n",
            "{\"tag\":\"a\"}\n",
            "{\"body\":\"x\"}\n",
            "{\"tag\":\"a\",\"body\":\"x\",\"n\":\"abc\"}\n",
            "{\"tag\":\"a\",\"body\":\"x\"} trailing\n",
            "[1,2]\n",
            "{\"tag\":\"a\",\"body\":[\"x\"]}\n",
        );
        let (g, b, _) = run(data.as_bytes(), &spec, LabelMode::Required, None);
        assert_eq!(g.len(), 2);
        assert_eq!(g[0].label.as_deref(), Some("1"));
        assert_eq!(g[0].texts, ["", "x"]);
        assert_eq!(g[1].label.as_deref(), Some("true"));
        assert_eq!(g[1].numbers, [Some(3.5)]);
        let reasons: Vec<BadReason> = b.iter().map(|x| x.reason).collect();
        assert_eq!(
            reasons,
            [
                BadReason::BadJson,
                BadReason::MissingField,
                BadReason::MissingField,
                BadReason::BadNumber,
                BadReason::BadJson,
                BadReason::BadJson,
                BadReason::BadJson
            ]
        );
        assert_eq!(b[0].line, 3);
    }

    #[test]
    fn json_invalid_utf8_is_lossy() {
        let spec = json_spec();
        let mut chunk_data = b"{\"tag\":\"a\",\"body\":\"caf".to_vec();
        chunk_data.extend(b"\xff\"}\n");
        let chunk = Chunk {
            input: 0,
            seq: 0,
            first_line: 1,
            data: chunk_data,
            skipped: None,
            columns: None,
        };
        let mut lossy = None;
        parse_chunk(
            &chunk,
            &spec,
            LabelMode::Required,
            &mut ParseScratch::default(),
            |f| lossy = Some(f.lossy),
            |_| panic!(),
        );
        assert_eq!(lossy, Some(true));
    }
}
