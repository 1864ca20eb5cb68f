//! Checks of tamis's on-disk formats: shards, the dataset manifest and
//! document-frequency files.
//!
//! * Shards round-trip arbitrary rows through write → map → read, and the `sprs`
//!   CSR view agrees.
//! * The bytes follow the container layout documented in `src/container.rs`
//!   (parsed here by hand from that table, not with tamis's parser).
//! * Every flipped byte and every truncation is caught, with the error variant
//!   expected for the place that was damaged; a forged version number (header
//!   checksum recomputed) gives `Error::Version`; forged structure (all checksums
//!   recomputed) is caught by `verify` or on open, never by a panic.
//! * The manifest's documented checksum rule, and every changed byte caught.
//! * Document-frequency files: every flipped byte caught by `DocFreq::open(.., true)`.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use proptest::prelude::*;
use proptest::test_runner::RngSeed;
use xxhash_rust::xxh3::xxh3_64;

use tamis::container::AlignedBytes;
use tamis::dataset::docfreq::{self, DocFreq};
use tamis::dataset::{self, Choices, IngestOptions, Log, Manifest};
use tamis::input::{Format, InputSpec};
use tamis::shard::{Shard, ShardInfo, ShardWriter};
use tamis::Error;

/// Deterministic proptest settings: a fixed seed, so a run fails only for a
/// reason that shows again on every run, and no regression files are written.
fn fixed(cases: u32, seed: u64) -> ProptestConfig {
    ProptestConfig {
        cases,
        failure_persistence: None,
        rng_seed: RngSeed::Fixed(seed),
        ..ProptestConfig::default()
    }
}

type Rows = Vec<(u32, Vec<u32>, Vec<f32>)>;
/// A change made to the bytes of a file.
type Change = Box<dyn Fn(&mut Vec<u8>)>;

// ---------------------------------------------------------------------------
// The container layout, from the table in the module docs of src/container.rs
// ---------------------------------------------------------------------------

const MAGIC: &[u8; 8] = b"\x89TAMIS\r\n";

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().unwrap())
}
fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().unwrap())
}
fn put_u32(b: &mut [u8], at: usize, v: u32) {
    b[at..at + 4].copy_from_slice(&v.to_le_bytes());
}
fn put_u64(b: &mut [u8], at: usize, v: u64) {
    b[at..at + 8].copy_from_slice(&v.to_le_bytes());
}

#[derive(Debug, Clone, Copy)]
struct Entry {
    id: u32,
    offset: usize,
    len: usize,
}

/// The parts of a container header, read by hand.
#[derive(Debug)]
struct Layout {
    /// Offset of the header checksum (64 + 32·S).
    sum_at: usize,
    /// End of the header proper, padded to 64 bytes.
    header_len: usize,
    entries: Vec<Entry>,
}

fn layout(b: &[u8]) -> Layout {
    let count = u32_at(b, 16) as usize;
    let sum_at = 64 + 32 * count;
    let entries = (0..count)
        .map(|i| {
            let e = 64 + 32 * i;
            Entry {
                id: u32_at(b, e),
                offset: u64_at(b, e + 8) as usize,
                len: u64_at(b, e + 16) as usize,
            }
        })
        .collect();
    Layout {
        sum_at,
        header_len: (sum_at + 8).div_ceil(64) * 64,
        entries,
    }
}

/// Recompute the header checksum (xxh3-64, seed 0, of every header byte before it).
fn reseal_header(b: &mut [u8]) {
    let l = layout(b);
    let sum = xxh3_64(&b[..l.sum_at]);
    put_u64(b, l.sum_at, sum);
}

/// Recompute every section checksum in the table, then the header checksum, so
/// only the structure that was changed is wrong.
fn reseal(b: &mut [u8]) {
    let l = layout(b);
    for (i, e) in l.entries.iter().enumerate() {
        let sum = xxh3_64(&b[e.offset..e.offset + e.len]);
        put_u64(b, 64 + 32 * i + 24, sum);
    }
    reseal_header(b);
}

/// Check a shard file against the documented layout, by hand.
fn check_documented_layout(b: &[u8], rows: &Rows, cols: u64) {
    assert_eq!(&b[..8], MAGIC, "magic");
    assert_eq!(u32_at(b, 8), 1, "kind 1 = shard");
    assert_eq!(u32_at(b, 12), 1, "shard format version");
    assert_eq!(u32_at(b, 16), 4, "four sections");
    assert_eq!(u32_at(b, 20), 0, "reserved");
    assert_eq!(u64_at(b, 24), b.len() as u64, "file length");
    let nnz: usize = rows.iter().map(|r| r.1.len()).sum();
    let params = [0, 1, 2, 3].map(|i| u64_at(b, 32 + 8 * i));
    assert_eq!(params, [rows.len() as u64, nnz as u64, cols, 0], "params");
    let l = layout(b);
    assert_eq!(
        u64_at(b, l.sum_at),
        xxh3_64(&b[..l.sum_at]),
        "header checksum"
    );
    assert!(b[l.sum_at + 8..l.header_len].iter().all(|&x| x == 0));
    // Sections in id order 1..=4, aligned, checksummed, zero bytes between them.
    let mut pos = l.header_len;
    for (i, e) in l.entries.iter().enumerate() {
        assert_eq!(e.id, i as u32 + 1, "section order");
        assert_eq!(u32_at(b, 64 + 32 * i + 4), 0, "reserved in entry");
        assert_eq!(e.offset % 64, 0, "section alignment");
        assert!(e.offset >= pos);
        assert!(b[pos..e.offset].iter().all(|&x| x == 0), "padding");
        let data = &b[e.offset..e.offset + e.len];
        assert_eq!(
            u64_at(b, 64 + 32 * i + 24),
            xxh3_64(data),
            "section checksum"
        );
        pos = e.offset + e.len;
    }
    assert_eq!(pos, b.len(), "no bytes after the last section");
    // Section contents as the shard module documents them.
    let sec = |id: usize| {
        let e = l.entries[id - 1];
        &b[e.offset..e.offset + e.len]
    };
    let le32 = |v: &[u8]| -> Vec<u32> {
        v.chunks(4)
            .map(|c| u32::from_le_bytes(c.try_into().unwrap()))
            .collect()
    };
    let idx: Vec<u32> = rows.iter().flat_map(|r| r.1.iter().copied()).collect();
    let val: Vec<u32> = rows
        .iter()
        .flat_map(|r| r.2.iter().map(|v| v.to_bits()))
        .collect();
    let mut ptr = vec![0u64];
    for r in rows {
        ptr.push(ptr.last().unwrap() + r.1.len() as u64);
    }
    let ptr_bytes: Vec<u64> = sec(3)
        .chunks(8)
        .map(|c| u64::from_le_bytes(c.try_into().unwrap()))
        .collect();
    assert_eq!(le32(sec(1)), idx, "indices section");
    assert_eq!(le32(sec(2)), val, "values section");
    assert_eq!(ptr_bytes, ptr, "indptr section");
    assert_eq!(le32(sec(4)), rows.iter().map(|r| r.0).collect::<Vec<_>>());
}

// ---------------------------------------------------------------------------
// Helpers
// ---------------------------------------------------------------------------

fn write_shard(dir: &Path, cols: u64, rows: &Rows) -> (PathBuf, ShardInfo) {
    let path = dir.join("train-000001.tms");
    let mut w = ShardWriter::create(&path, cols).unwrap();
    for (l, i, v) in rows {
        w.push(*l, i, v).unwrap();
    }
    let info = w.finish().unwrap();
    (path, info)
}

/// A small fixed shard of invented rows.
fn sample_rows() -> Rows {
    vec![
        (0, vec![3, 17, 900], vec![0.5, -0.25, 1.0]),
        (2, vec![], vec![]),
        (1, vec![1023], vec![-3.5]),
        (1, vec![0, 1, 2, 3, 4], vec![0.1, 0.2, 0.3, 0.4, 0.5]),
    ]
}

/// Variant name of an error, for comparing with what a damaged place should give.
fn variant(e: &Error) -> &'static str {
    match e {
        Error::Io { .. } => "Io",
        Error::BadMagic { .. } => "BadMagic",
        Error::Version { .. } => "Version",
        Error::Size { .. } => "Size",
        Error::Checksum { .. } => "Checksum",
        Error::Corrupt { .. } => "Corrupt",
        Error::Invalid(_) => "Invalid",
        Error::Mismatch { .. } => "Mismatch",
        Error::TooManyBad { .. } => "TooManyBad",
        Error::Insufficient { .. } => "Insufficient",
    }
}

/// Parse (and fully verify) shard bytes held in memory.
fn open_and_verify(bytes: &[u8], path: &Path) -> Result<Shard<AlignedBytes>, Error> {
    let s = Shard::from_bytes(AlignedBytes::from_slice(bytes), path)?;
    s.verify(None)?;
    Ok(s)
}

/// Open bytes as a shard, read every row (which must never panic once open has
/// succeeded) and verify.
fn open_read_verify(bytes: &[u8], path: &Path) -> Result<(), Error> {
    let s = Shard::from_bytes(AlignedBytes::from_slice(bytes), path)?;
    for i in 0..s.rows() {
        let r = s.row(i);
        assert_eq!(r.indices.len(), r.values.len());
    }
    s.verify(None)
}

/// Which error a flip at byte `pos` of a shard must give, and for a checksum
/// error, which section it must name.
fn expected_for_flip(l: &Layout, pos: usize) -> (&'static [&'static str], Option<&'static str>) {
    const NAMES: [&str; 4] = ["indices", "values", "indptr", "labels"];
    match pos {
        0..8 => (&["BadMagic"], None),
        8..12 => (&["Corrupt"], None), // kind
        // Section count: above 64 is refused outright; otherwise the checksum is
        // looked for elsewhere (or past the end of a small file).
        16..20 => (&["Corrupt", "Checksum", "Size"], None),
        // Version, reserved, length, params, section table, header checksum: the
        // header checksum covers them (the version is only read once it matched).
        p if p < l.sum_at + 8 => (&["Checksum"], Some("header")),
        p if p < l.header_len => (&["Corrupt"], None), // header padding
        p => {
            for (i, e) in l.entries.iter().enumerate() {
                if (e.offset..e.offset + e.len).contains(&p) {
                    return if e.id == 3 {
                        // Row offsets are checked on open, before any checksum.
                        (&["Corrupt", "Checksum"], Some(NAMES[i]))
                    } else {
                        (&["Checksum"], Some(NAMES[i]))
                    };
                }
            }
            (&["Corrupt"], None) // padding between sections
        }
    }
}

fn check_flip(good: &[u8], path: &Path, pos: usize, mask: u8) {
    assert_ne!(mask, 0);
    let l = layout(good);
    let mut bad = good.to_vec();
    bad[pos] ^= mask;
    let err = match open_read_verify(&bad, path) {
        Ok(()) => panic!("flip {mask:#04x} at byte {pos} of {} not caught", bad.len()),
        Err(e) => e,
    };
    let (kinds, section) = expected_for_flip(&l, pos);
    assert!(
        kinds.contains(&variant(&err)),
        "flip at byte {pos}: got {err} ({}), expected one of {kinds:?}",
        variant(&err)
    );
    if let (Error::Checksum { section: got, .. }, Some(want)) = (&err, section) {
        assert_eq!(
            got, want,
            "flip at byte {pos}: checksum error names the section"
        );
    }
    assert!(
        err.to_string().contains(&path.display().to_string()),
        "error does not name the file: {err}"
    );
}

// ---------------------------------------------------------------------------
// Shards: round trip
// ---------------------------------------------------------------------------

fn finite_f32() -> impl Strategy<Value = f32> {
    use prop::num::f32;
    (f32::POSITIVE | f32::NEGATIVE | f32::NORMAL | f32::SUBNORMAL | f32::ZERO)
        .prop_filter("finite", |v| v.is_finite())
}

/// Column counts from 1 to u32::MAX (the most an `sprs` view with u32 indices
/// holds; other counts are checked apart in `csr_view_of_every_shard_that_opens`), and
/// rows whose indices are strictly increasing and below the count.
fn shard_strategy(max_rows: usize) -> impl Strategy<Value = (u64, Rows)> {
    prop_oneof![
        (0u32..=6).prop_map(|k| 1u64 << k),
        Just(1u64 << 10),
        Just(1u64 << 28),
        Just(1u64 << 31)
    ]
    .prop_flat_map(move |cols| {
        let row = (
            prop_oneof![0u32..4, any::<u32>()],
            prop::collection::vec(0..cols, 0..24),
            prop::collection::vec(finite_f32(), 24),
        )
            .prop_map(|(label, mut idx, vals)| {
                idx.sort_unstable();
                idx.dedup();
                let idx: Vec<u32> = idx.into_iter().map(|i| i as u32).collect();
                let vals = vals[..idx.len()].to_vec();
                (label, idx, vals)
            });
        (Just(cols), prop::collection::vec(row, 0..max_rows))
    })
}

fn check_round_trip<B: AsRef<[u8]>>(s: &Shard<B>, cols: u64, rows: &Rows, info: &ShardInfo) {
    let nnz: usize = rows.iter().map(|r| r.1.len()).sum();
    assert_eq!((s.rows(), s.nnz(), s.cols()), (rows.len(), nnz, cols));
    assert_eq!(s.header_checksum(), info.checksum);
    s.verify(None).unwrap();
    for (i, (l, idx, val)) in rows.iter().enumerate() {
        let r = s.row(i);
        assert_eq!(r.label, *l);
        assert_eq!(r.indices, &idx[..]);
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(r.values), bits(val), "row {i} values, bit for bit");
    }
    assert_eq!(s.labels(), rows.iter().map(|r| r.0).collect::<Vec<_>>());
    // Labels: verify accepts a class count above every label and refuses one
    // that leaves a label out.
    if let Some(&max) = rows.iter().map(|r| &r.0).max() {
        if let Some(n) = max.checked_add(1) {
            s.verify(Some(n)).unwrap();
        }
        assert!(matches!(s.verify(Some(max)), Err(Error::Corrupt { .. })));
    }
    // The sprs view holds the same matrix.
    let m = s.csr().unwrap();
    assert_eq!(m.shape(), (rows.len(), cols as usize));
    assert_eq!(m.nnz(), nnz);
    assert!(m.is_csr());
    for (i, (_, idx, val)) in rows.iter().enumerate() {
        let v = m.outer_view(i).unwrap();
        assert_eq!(v.indices(), &idx[..]);
        assert_eq!(v.data().len(), val.len());
        for (a, b) in v.data().iter().zip(val) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
    }
    let mut seen = 0;
    for (&v, (r, c)) in m.iter() {
        let row = &rows[r as usize];
        let k = row.1.binary_search(&c).expect("entry exists");
        assert_eq!(v.to_bits(), row.2[k].to_bits());
        seen += 1;
    }
    assert_eq!(seen, nnz);
}

proptest! {
    #![proptest_config(fixed(48, 0x5A4D_0001))]

    #[test]
    fn shard_round_trip((cols, rows) in shard_strategy(40)) {
        let dir = tempfile::tempdir().unwrap();
        let (path, info) = write_shard(dir.path(), cols, &rows);
        let nnz: usize = rows.iter().map(|r| r.1.len()).sum();
        prop_assert_eq!(&info.path, &path);
        prop_assert_eq!((info.rows, info.nnz), (rows.len() as u64, nnz as u64));
        prop_assert_eq!(info.bytes, std::fs::metadata(&path).unwrap().len());
        // No side files are left next to the shard.
        let names: Vec<_> = std::fs::read_dir(dir.path()).unwrap().map(|e| e.unwrap().file_name()).collect();
        prop_assert_eq!(names.len(), 1, "{:?}", names);

        let bytes = std::fs::read(&path).unwrap();
        check_documented_layout(&bytes, &rows, cols);
        check_round_trip(&Shard::open(&path).unwrap(), cols, &rows, &info);
        check_round_trip(&Shard::read(&path).unwrap(), cols, &rows, &info);
        check_round_trip(
            &Shard::from_bytes(AlignedBytes::from_slice(&bytes), &path).unwrap(),
            cols,
            &rows,
            &info,
        );
    }

    /// Any byte flipped anywhere is caught, with the variant expected there.
    #[test]
    fn shard_flip_anywhere_is_caught(
        (cols, rows) in shard_strategy(12),
        at in any::<prop::sample::Index>(),
        mask in 1u8..=255,
    ) {
        let dir = tempfile::tempdir().unwrap();
        let (path, _) = write_shard(dir.path(), cols, &rows);
        let good = std::fs::read(&path).unwrap();
        check_flip(&good, &path, at.index(good.len()), mask);
    }

    /// Truncation at every length is caught.
    #[test]
    fn shard_truncation_is_caught((cols, rows) in shard_strategy(12)) {
        let dir = tempfile::tempdir().unwrap();
        let (path, _) = write_shard(dir.path(), cols, &rows);
        let good = std::fs::read(&path).unwrap();
        for len in 0..good.len() {
            let e = open_read_verify(&good[..len], &path).err();
            let want = if len < 8 { "BadMagic" } else { "Size" };
            prop_assert_eq!(e.as_ref().map(variant), Some(want), "truncated to {}", len);
        }
    }
}

#[test]
fn csr_view_of_every_shard_that_opens() {
    // Shard::from_bytes accepts power-of-two column counts up to 2^31 and
    // `verify` passes such a shard; its CSR view must then exist too. Wider or
    // other counts are refused when writing.
    let dir = tempfile::tempdir().unwrap();
    for bad in [1u64 << 32, 3, 0] {
        let p = dir.path().join(format!("bad-{bad}.tms"));
        assert!(
            ShardWriter::create(&p, bad).is_err(),
            "{bad} columns accepted"
        );
    }
    let cols = 1u64 << 31;
    let rows: Rows = vec![
        (0, vec![0, (1u32 << 31) - 1], vec![1.0, -1.0]),
        (1, vec![7], vec![2.0]),
    ];
    let (path, info) = write_shard(dir.path(), cols, &rows);
    let s = Shard::open(&path).unwrap();
    s.verify(Some(2)).unwrap();
    assert_eq!(s.header_checksum(), info.checksum);
    match s.csr() {
        Ok(m) => assert_eq!(m.shape(), (2, cols as usize)),
        Err(e) => panic!("a shard that opens and verifies has no CSR view: {e}"),
    }
}

#[test]
fn every_byte_of_a_shard_is_checked() {
    let dir = tempfile::tempdir().unwrap();
    let (path, _) = write_shard(dir.path(), 1 << 10, &sample_rows());
    let good = std::fs::read(&path).unwrap();
    open_and_verify(&good, &path).unwrap();
    for pos in 0..good.len() {
        for mask in [0x01, 0x10, 0x80, 0xFF] {
            check_flip(&good, &path, pos, mask);
        }
    }
    // Bytes added at the end.
    for extra in [&[0u8][..], &[0; 64], b"trailing"] {
        let mut longer = good.clone();
        longer.extend_from_slice(extra);
        let e = open_read_verify(&longer, &path).unwrap_err();
        assert_eq!(variant(&e), "Size", "{e}");
    }
}

#[test]
fn forged_version_gives_version_error() {
    let dir = tempfile::tempdir().unwrap();
    let (path, _) = write_shard(dir.path(), 1 << 10, &sample_rows());
    let good = std::fs::read(&path).unwrap();
    // Resealing an untouched file changes nothing.
    let mut same = good.clone();
    reseal(&mut same);
    assert_eq!(same, good);
    for v in [0u32, 2, 3, 1000, u32::MAX] {
        let mut bad = good.clone();
        put_u32(&mut bad, 12, v);
        // Without a new checksum, the damage shows as a header checksum error.
        let e = open_and_verify(&bad, &path).err().unwrap();
        assert!(
            matches!(e, Error::Checksum { ref section, .. } if section == "header"),
            "{e}"
        );
        reseal_header(&mut bad);
        match open_and_verify(&bad, &path) {
            Err(Error::Version {
                got,
                oldest,
                newest,
                path: p,
            }) => {
                assert_eq!((got, oldest, newest), (v, 1, 1));
                assert_eq!(p, path);
            }
            other => panic!(
                "version {v}: expected Error::Version, got {:?}",
                other.err()
            ),
        }
    }
}

/// Damage with every checksum recomputed: what only structure checks can catch.
#[test]
fn forged_structure_is_caught_without_panics() {
    let dir = tempfile::tempdir().unwrap();
    let rows = sample_rows();
    let (path, _) = write_shard(dir.path(), 1 << 10, &rows);
    let good = std::fs::read(&path).unwrap();
    let l = layout(&good);
    let sec = |id: u32| l.entries.iter().find(|e| e.id == id).copied().unwrap();
    let (ind, val, ptr, lab) = (sec(1), sec(2), sec(3), sec(4));

    let forge = |what: &str, change: &dyn Fn(&mut Vec<u8>), header_only: bool| -> Error {
        let mut b = good.clone();
        change(&mut b);
        if header_only {
            reseal_header(&mut b);
        } else {
            reseal(&mut b);
        }
        match open_read_verify(&b, &path) {
            Ok(()) => panic!("{what}: forged shard accepted"),
            Err(e) => e,
        }
    };
    let kind = |e: &Error| variant(e);

    // An index at the column count (row 0's last index 900 → 1024).
    let e = forge("index = cols", &|b| put_u32(b, ind.offset + 8, 1024), false);
    assert_eq!(kind(&e), "Corrupt", "{e}");
    // Indices not increasing inside a row (3, 17 → 17, 17).
    let e = forge("repeated index", &|b| put_u32(b, ind.offset, 17), false);
    assert_eq!(kind(&e), "Corrupt", "{e}");
    // The CSR view refuses both as well.
    for (at, v) in [(8, 1024u32), (0, 17)] {
        let mut b = good.clone();
        put_u32(&mut b, ind.offset + at, v);
        reseal(&mut b);
        let s = Shard::from_bytes(AlignedBytes::from_slice(&b), &path).unwrap();
        assert!(s.csr().is_err(), "csr accepted a bad index");
    }
    // Non-finite values.
    for bits in [
        f32::NAN.to_bits(),
        f32::INFINITY.to_bits(),
        f32::NEG_INFINITY.to_bits(),
    ] {
        let e = forge(
            "non-finite value",
            &|b| put_u32(b, val.offset + 4, bits),
            false,
        );
        assert_eq!(kind(&e), "Corrupt", "{e}");
    }
    // Row offsets: not starting at 0, decreasing, not ending at nnz, far out.
    for (at, v) in [
        (0, 1u64),
        (8, 4),
        (16, 2),
        (32, 8),
        (32, u64::MAX),
        (8, u64::MAX),
    ] {
        let e = forge("row offsets", &|b| put_u64(b, ptr.offset + at, v), false);
        assert_eq!(kind(&e), "Corrupt", "offset {at} = {v}: {e}");
    }
    // A label at or above the class count.
    let mut b = good.clone();
    put_u32(&mut b, lab.offset, 7);
    reseal(&mut b);
    let s = Shard::from_bytes(AlignedBytes::from_slice(&b), &path).unwrap();
    s.verify(None).unwrap();
    s.verify(Some(8)).unwrap();
    assert!(matches!(s.verify(Some(7)), Err(Error::Corrupt { .. })));

    // Header parameters that disagree with the sections.
    let params: [(usize, u64, &[&str]); 6] = [
        (32, 5, &["Size"]),                   // rows
        (32, u64::MAX, &["Size", "Corrupt"]), // rows: mismatch, or the count overflows
        (40, 8, &["Size"]),                   // nnz
        (40, u64::MAX / 2, &["Corrupt"]),     // nnz · 4 overflows
        (48, 0, &["Corrupt"]),                // no columns
        (48, (1 << 32) + 1, &["Corrupt"]),    // more columns than u32 indices reach
    ];
    for (at, v, want) in params {
        let e = forge("params", &|b| put_u64(b, at, v), true);
        assert!(want.contains(&kind(&e)), "param at {at} = {v}: {e}");
    }
    // Another kind of file.
    let e = forge("kind", &|b| put_u32(b, 8, 2), true);
    assert_eq!(kind(&e), "Corrupt", "{e}");
    assert!(e.to_string().contains("document-frequency"), "{e}");
    // Section table: misaligned, overlapping, past the end, missing section.
    let entry = |i: usize| 64 + 32 * i;
    let cases: Vec<(&str, Change)> = vec![
        (
            "misaligned",
            Box::new(move |b| put_u64(b, entry(1) + 8, val.offset as u64 + 4)),
        ),
        (
            "overlap",
            Box::new(move |b| put_u64(b, entry(1) + 8, ind.offset as u64)),
        ),
        (
            "past end",
            Box::new(move |b| put_u64(b, entry(3) + 16, lab.len as u64 + 64)),
        ),
        (
            "len overflow",
            Box::new(move |b| put_u64(b, entry(3) + 16, u64::MAX)),
        ),
        ("missing", Box::new(move |b| put_u32(b, entry(3), 9))),
        ("no sections", Box::new(|b| put_u32(b, 16, 0))),
    ];
    for (what, change) in &cases {
        let e = forge(what, change.as_ref(), true);
        assert!(
            ["Corrupt", "Size"].contains(&kind(&e)),
            "{what}: {e} ({})",
            kind(&e)
        );
    }
}

// ---------------------------------------------------------------------------
// The manifest and document-frequency files of a real ingest
// ---------------------------------------------------------------------------

/// Invented messages to the Quillmere Ferry Cooperative's inbox.
const INBOX: &str = "\
ham\tThe 07:40 crossing from Quillmere to Wrenhaven leaves from pier 3 tomorrow.
spam\tWIN a free season ticket!!! reply now with your card number
ham\tFerry fares for the Ölmund harbour route are unchanged this winter.
spam\tcheap deck chairs cheap cheap, click here
ham\tTide tables for Wrenhaven harbour are posted at the cooperative office.
ham\tThe evening sailing to Ölmund is delayed by fog; tea is served on board.
spam\tyou have been selected: claim your harbour lottery prize today
ham\tMembers' meeting on Thursday in the Quillmere boathouse.
";

fn quiet() -> Log {
    Arc::new(|_: &str| {})
}

fn ingest_options(input: &Path, out: &Path, spec: InputSpec) -> IngestOptions {
    IngestOptions {
        inputs: vec![input.to_string_lossy().into_owned()],
        out: out.to_path_buf(),
        spec,
        choices: Choices {
            seed: Some(5),
            log2_buckets: Some(10),
            validation: Some(0.25),
            shard_rows: Some(3),
            scatter: Some(2),
            ..Choices::default()
        },
        append: false,
        force: false,
        threads: 1,
        max_bad_fraction: 0.5,
        progress: false,
        sync: true,
    }
}

/// Ingest the invented inbox into `dir/ds`; return the dataset folder.
fn ingest_inbox(dir: &Path) -> PathBuf {
    let input = dir.join("inbox.tsv");
    std::fs::write(&input, INBOX).unwrap();
    let out = dir.join("ds");
    let s = dataset::ingest(
        &ingest_options(&input, &out, InputSpec::tsv(1 << 20)),
        quiet(),
    )
    .unwrap();
    assert_eq!(s.train_rows + s.validation_rows, 8);
    out
}

/// Offset of the 16 checksum digits in manifest bytes.
fn checksum_digits(bytes: &[u8]) -> usize {
    let key = b"\"checksum\": \"";
    bytes.windows(key.len()).position(|w| w == key).unwrap() + key.len()
}

#[test]
fn manifest_follows_its_documented_checksum_rule() {
    let dir = tempfile::tempdir().unwrap();
    let ds = ingest_inbox(dir.path());
    let path = Manifest::path_in(&ds);
    let bytes = std::fs::read(&path).unwrap();
    // Plain JSON whose first key is "checksum"; 16 hex digits of the xxh3-64 of
    // the file with those digits replaced by '0' (module docs of
    // src/dataset/manifest.rs).
    let v: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
    let body = std::str::from_utf8(&bytes).unwrap();
    let first = body.trim_start().strip_prefix('{').unwrap().trim_start();
    assert!(
        first.starts_with("\"checksum\""),
        "first key: {:?}",
        &first[..20]
    );
    let at = checksum_digits(&bytes);
    assert!(at < 64);
    let stored = std::str::from_utf8(&bytes[at..at + 16]).unwrap();
    let mut zeroed = bytes.clone();
    zeroed[at..at + 16].copy_from_slice(b"0000000000000000");
    assert_eq!(stored, format!("{:016x}", xxh3_64(&zeroed)));
    assert_eq!(v["checksum"], stored);
    let m = Manifest::from_bytes(&bytes, &path).unwrap();
    assert_eq!(m.to_bytes(), bytes, "serialisation is stable");
    // What ingest wrote verifies, and the listed files are the ones on disk.
    let report = dataset::verify(&ds).unwrap();
    assert!(report.problems.is_empty(), "{:?}", report.problems);
    assert_eq!(
        report.checked,
        1 + m.shards.len() + m.doc_freq.len() + m.sketches.len()
    );
    assert_eq!(m.doc_freq.len(), 1);
    assert_eq!(m.sketches.len(), 1, "one token sketch per batch by default");
}

#[test]
fn manifest_every_changed_byte_outside_the_checksum_is_caught() {
    let dir = tempfile::tempdir().unwrap();
    let ds = ingest_inbox(dir.path());
    let path = Manifest::path_in(&ds);
    let good = std::fs::read(&path).unwrap();
    let at = checksum_digits(&good);
    let mut bad = good.clone();
    for pos in (0..good.len()).filter(|p| !(at..at + 16).contains(p)) {
        for v in 0..=255u8 {
            if v == good[pos] {
                continue;
            }
            bad[pos] = v;
            let r = Manifest::from_bytes(&bad, &path);
            assert!(r.is_err(), "byte {pos} changed to {v:#04x} not caught");
        }
        bad[pos] = good[pos];
    }
    for len in 0..good.len() {
        assert!(
            Manifest::from_bytes(&good[..len], &path).is_err(),
            "truncated to {len}"
        );
    }
}

#[test]
fn manifest_every_changed_checksum_digit_is_caught() {
    // The module docs say "any changed byte is caught"; that includes the 16
    // digits of the checksum itself.
    let dir = tempfile::tempdir().unwrap();
    let ds = ingest_inbox(dir.path());
    let path = Manifest::path_in(&ds);
    // The ingest's manifest holds a time stamp, so its checksum varies from run
    // to run; pick a variant whose checksum has both letter and decimal digits,
    // so every run tries the same kinds of change.
    let mut m = Manifest::load(&ds).unwrap();
    let good = (0..)
        .map(|k| {
            m.written_by = format!("tamis formats check {k}");
            m.to_bytes()
        })
        .find(|b| {
            let d = &b[checksum_digits(b)..checksum_digits(b) + 16];
            d.iter().any(u8::is_ascii_digit) && d.iter().any(u8::is_ascii_lowercase)
        })
        .unwrap();
    Manifest::from_bytes(&good, &path).unwrap();
    let at = checksum_digits(&good);
    let mut accepted = Vec::new();
    for pos in at..at + 16 {
        for v in 0..=255u8 {
            if v == good[pos] {
                continue;
            }
            let mut bad = good.clone();
            bad[pos] = v;
            if Manifest::from_bytes(&bad, &path).is_ok() {
                accepted.push(format!(
                    "digit {} {:?} → {:?}",
                    pos - at,
                    good[pos] as char,
                    v as char
                ));
            }
        }
    }
    assert!(
        accepted.is_empty(),
        "changed checksum digits accepted:\n{}",
        accepted.join("\n")
    );
}

#[test]
fn manifest_forged_version_and_format() {
    let dir = tempfile::tempdir().unwrap();
    let ds = ingest_inbox(dir.path());
    let path = Manifest::path_in(&ds);
    let m = Manifest::load(&ds).unwrap();
    // to_bytes recomputes the checksum, so only the forged field is wrong.
    let mut v2 = m.clone();
    v2.format_version = 2;
    match Manifest::from_bytes(&v2.to_bytes(), &path) {
        Err(Error::Version { got: 2, .. }) => {}
        other => panic!("expected Error::Version, got {:?}", other.err()),
    }
    let mut other = m.clone();
    other.format = "some-other-format".into();
    let e = Manifest::from_bytes(&other.to_bytes(), &path).unwrap_err();
    assert_eq!(variant(&e), "Corrupt", "{e}");
    let mut wide = m.clone();
    wide.features.log2_buckets = 40;
    let e = Manifest::from_bytes(&wide.to_bytes(), &path).unwrap_err();
    assert_eq!(variant(&e), "Corrupt", "{e}");
    assert!(e.to_string().contains(&path.display().to_string()), "{e}");
}

/// Expected error variant for a flip at `pos` of a document-frequency file.
fn docfreq_expected(l: &Layout, pos: usize) -> &'static [&'static str] {
    match pos {
        0..8 => &["BadMagic"],
        8..12 => &["Corrupt"],
        16..20 => &["Corrupt", "Checksum", "Size"],
        p if p < l.sum_at + 8 => &["Checksum"],
        p if p < l.header_len => &["Corrupt"],
        p if (l.entries[0].offset..l.entries[0].offset + l.entries[0].len).contains(&p) => {
            &["Checksum"]
        }
        _ => &["Corrupt"],
    }
}

#[test]
fn docfreq_every_flipped_byte_is_caught() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("docfreq-000004.tmd");
    let counts: Vec<u32> = (0..1024u32).map(|i| (i * 7919) % 13).collect();
    let sum = docfreq::write(&path, 10, 40, 0, &counts).unwrap();
    let good = std::fs::read(&path).unwrap();
    let d = DocFreq::open(&path, true).unwrap();
    assert_eq!(d.counts().unwrap(), &counts[..]);
    assert_eq!((d.log2_buckets(), d.rows(), d.checksum()), (10, 40, sum));
    drop(d);
    // The documented layout: kind 2, version 1, one section of 4 bytes per bucket.
    assert_eq!(&good[..8], MAGIC);
    assert_eq!(
        (u32_at(&good, 8), u32_at(&good, 12), u32_at(&good, 16)),
        (2, 1, 1)
    );
    let l = layout(&good);
    assert_eq!(l.entries[0].len, 4096);
    assert_eq!(u64_at(&good, l.sum_at), sum);

    let bad_path = dir.path().join("damaged.tmd");
    let mut bad = good.clone();
    // Every header byte, and the counts section's bytes at a stride plus its
    // first and last bytes (each write-and-map costs a file; a section byte is
    // covered by the same checksum as its neighbours).
    let section = l.entries[0].offset..l.entries[0].offset + l.entries[0].len;
    let positions: Vec<usize> = (0..good.len())
        .filter(|p| !section.contains(p) || (p - section.start) % 29 == 0)
        .chain([section.start + 1, section.end - 1])
        .collect();
    for pos in positions {
        for mask in [0x01u8, 0x80] {
            bad[pos] ^= mask;
            std::fs::write(&bad_path, &bad).unwrap();
            match DocFreq::open(&bad_path, true) {
                Ok(_) => panic!("flip {mask:#04x} at byte {pos} not caught"),
                Err(e) => {
                    let want = docfreq_expected(&l, pos);
                    assert!(
                        want.contains(&variant(&e)),
                        "byte {pos}: {e}, want {want:?}"
                    );
                    assert!(e.to_string().contains(&bad_path.display().to_string()));
                }
            }
            bad[pos] ^= mask;
        }
    }
    for len in [0, 7, 8, 71, 72, 127, 128, 129, good.len() - 1] {
        std::fs::write(&bad_path, &good[..len]).unwrap();
        assert!(
            DocFreq::open(&bad_path, true).is_err(),
            "truncated to {len}"
        );
    }
}

#[test]
fn docfreq_of_an_ingest_verifies_and_catches_flips() {
    let dir = tempfile::tempdir().unwrap();
    let ds = ingest_inbox(dir.path());
    let m = Manifest::load(&ds).unwrap();
    let path = ds.join(&m.doc_freq[0].file);
    let d = DocFreq::open(&path, true).unwrap();
    assert_eq!(format!("{:016x}", d.checksum()), m.doc_freq[0].checksum);
    assert_eq!(d.rows(), m.train_rows());
    drop(d);
    let good = std::fs::read(&path).unwrap();
    for pos in (0..good.len()).step_by(37) {
        let mut bad = good.clone();
        bad[pos] ^= 0x04;
        std::fs::write(&path, &bad).unwrap();
        assert!(
            DocFreq::open(&path, true).is_err(),
            "flip at {pos} not caught"
        );
    }
}

#[test]
fn docfreq_forged_without_sections_is_an_error_not_a_panic() {
    // A header-only file whose checksum is right (64 header bytes, zero
    // sections, checksum, no padding): damaged, but must give an error naming
    // the file (rules: never panic on damaged files).
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("docfreq-000000.tmd");
    let mut b = vec![0u8; 72];
    b[..8].copy_from_slice(MAGIC);
    put_u32(&mut b, 8, 2);
    put_u32(&mut b, 12, 1);
    put_u64(&mut b, 24, 72);
    put_u64(&mut b, 32, 10);
    reseal_header(&mut b);
    std::fs::write(&path, &b).unwrap();
    for verify in [false, true] {
        let r = std::panic::catch_unwind(|| DocFreq::open(&path, verify).map(|_| ()));
        match r {
            Ok(Err(e)) => assert!(e.to_string().contains(&path.display().to_string()), "{e}"),
            Ok(Ok(())) => panic!("verify={verify}: forged file accepted"),
            Err(_) => panic!("verify={verify}: DocFreq::open panicked on a 72-byte file"),
        }
    }
}

#[test]
fn ingest_never_writes_what_its_own_verify_rejects() {
    // A numeric CSV column may hold any finite f64, such as 1e39, which is
    // beyond f32. Ingest must either skip such a record or store a finite value:
    // shards whose values are not finite fail `verify`.
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("crossings.csv");
    std::fs::write(
        &input,
        "label,body,crossings\n\
         ham,Quillmere ferry on time,12\n\
         ham,Wrenhaven pier repaired,1e39\n\
         spam,free harbour prize,-3e38\n\
         spam,claim your deck chair,-1e300\n\
         ham,fog over Ölmund,0.5\n",
    )
    .unwrap();
    let spec = InputSpec {
        format: Format::Csv,
        label: "label".into(),
        text: vec!["body".into()],
        numeric: vec!["crossings".into()],
        max_line_bytes: 1 << 20,
    };
    let out = dir.path().join("ds");
    let mut opts = ingest_options(&input, &out, spec);
    opts.max_bad_fraction = 1.0;
    if dataset::ingest(&opts, quiet()).is_ok() {
        let report = dataset::verify(&out).unwrap();
        let problems: Vec<String> = report.problems.iter().map(|e| e.to_string()).collect();
        assert!(
            problems.is_empty(),
            "verify rejects what ingest wrote:\n{}",
            problems.join("\n")
        );
    }
}
