//! End-to-end tests of `tamis verify`: a fresh dataset passes; a changed byte in
//! any section, a truncated or deleted shard, a damaged manifest or
//! document-frequency file, and a shard swapped in from another dataset are each
//! reported with the file (and section) named and a non-zero exit.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use tamis::dataset::Split;
use xxhash_rust::xxh3::xxh3_64;

/// A dataset of `fixtures/inbox.tsv` in `dir`.
fn dataset(dir: &Path, extra: &[&str]) {
    ingest(&[&fixture("inbox.tsv")], dir, extra).ok();
}

/// The training shard with the most rows.
fn biggest_train_shard(dir: &Path) -> PathBuf {
    let m = manifest(dir);
    let e = m
        .shards
        .iter()
        .filter(|e| e.split == Split::Train)
        .max_by_key(|e| e.rows)
        .unwrap();
    dir.join(&e.file)
}

fn file_count(dir: &Path) -> usize {
    let m = manifest(dir);
    1 + m.shards.len() + m.doc_freq.len() + m.sketches.len()
}

#[test]
fn a_fresh_dataset_verifies() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let n = file_count(&out);
    tamis(["verify", s(&out)])
        .ok()
        .stdout_has(&format!("ok: {n} files"));
    // Single files: a shard, the document frequencies, the manifest.
    let m = manifest(&out);
    let e = &m.shards[0];
    tamis(["verify", s(&out.join(&e.file))])
        .ok()
        .stdout_has(&format!(
            "({} rows, {} nonzeros)",
            thousands(e.rows),
            thousands(e.nnz)
        ));
    tamis(["verify", s(&out.join(&m.doc_freq[0].file))])
        .ok()
        .stdout_has("ok: document frequencies");
    tamis(["verify", s(&out.join("manifest.json"))])
        .ok()
        .stdout_has("ok: manifest");
    tamis(["verify", s(&out.join(&m.sketches[0].file))])
        .ok()
        .stdout_has("ok: token sketch");
}

#[test]
fn a_damaged_token_sketch_is_named() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &["--sketch-min-count", "1"]);
    let m = manifest(&out);
    let path = out.join(&m.sketches[0].file);
    let good = std::fs::read(&path).unwrap();
    let (off, len) = section(&good, 1);
    let mut bad = good.clone();
    bad[off + len - 1] ^= 0x20;
    std::fs::write(&path, &bad).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has(&format!("damaged: {}", path.display()))
        .stderr_has("checksum mismatch in sketch");
    tamis(["verify", s(&path)]).fails().stderr_has("sketch");
    // Truncated.
    std::fs::write(&path, &good[..good.len() - 1]).unwrap();
    tamis(["verify", s(&out)]).fails().stderr_has("truncated");
    std::fs::write(&path, &good).unwrap();
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn a_changed_byte_in_a_section_is_named() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let n = file_count(&out);
    let shard = biggest_train_shard(&out);
    let name = shard.file_name().unwrap().to_string_lossy().into_owned();
    let good = std::fs::read(&shard).unwrap();
    for (id, what) in [
        (SEC_VALUES, "values"),
        (SEC_INDICES, "indices"),
        (SEC_LABELS, "labels"),
    ] {
        let (off, len) = section(&good, id);
        assert!(len > 0, "{what} is empty");
        let mut bad = good.clone();
        bad[off + len / 2] ^= 0x04;
        std::fs::write(&shard, &bad).unwrap();
        let o = tamis(["verify", s(&out)]);
        o.fails()
            .stderr_has(&format!("damaged: {}", shard.display()))
            .stderr_has(&format!("checksum mismatch in {what}"))
            .stderr_has(&format!("1 of {n} files"));
        assert_eq!(o.stderr.matches("damaged:").count(), 1, "{}", o.stderr);
        assert!(o.stderr.contains(&name));
        // The single file on its own.
        tamis(["verify", s(&shard)])
            .fails()
            .stderr_has(&name)
            .stderr_has(what);
        std::fs::write(&shard, &good).unwrap();
    }
    tamis(["verify", s(&out)]).ok();
}

#[test]
fn a_changed_header_byte_is_caught() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let shard = biggest_train_shard(&out);
    let mut bytes = std::fs::read(&shard).unwrap();
    // Byte 33 lies in the first header parameter, the row count.
    bytes[33] ^= 0x01;
    std::fs::write(&shard, &bytes).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has(&shard.display().to_string());
}

#[test]
fn a_truncated_shard_is_reported() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let shard = biggest_train_shard(&out);
    let good = std::fs::read(&shard).unwrap();
    for keep in [good.len() - 100, 40, 0] {
        std::fs::write(&shard, &good[..keep]).unwrap();
        tamis(["verify", s(&out)])
            .fails()
            .stderr_has(&format!("damaged: {}", shard.display()));
        tamis(["verify", s(&shard)]).fails();
    }
    std::fs::write(&shard, &good[..good.len() - 100]).unwrap();
    tamis(["verify", s(&out)]).fails().stderr_has("truncated");
}

#[test]
fn a_deleted_shard_is_reported() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let shard = biggest_train_shard(&out);
    std::fs::remove_file(&shard).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has(&format!("damaged: {}", shard.display()))
        .stderr_has("missing");
}

#[test]
fn a_shard_from_another_dataset_is_reported() {
    let t = tmp();
    let (a, b) = (t.path().join("a"), t.path().join("b"));
    dataset(&a, &[]);
    dataset(&b, &["--seed", "2"]);
    tamis(["verify", s(&b)]).ok();
    // A shard name both datasets use (shard numbers depend on the order in
    // which writers were opened, which the seed changes).
    let theirs = manifest(&b);
    let name = &manifest(&a)
        .shards
        .iter()
        .find(|e| theirs.shards.iter().any(|o| o.file == e.file))
        .expect("a shared shard name")
        .file
        .clone();
    std::fs::copy(b.join(name), a.join(name)).unwrap();
    // The shard is sound by itself but not the one the manifest lists.
    tamis(["verify", s(&a.join(name))]).ok();
    tamis(["verify", s(&a)])
        .fails()
        .stderr_has(&format!("damaged: {}", a.join(name).display()))
        .stderr_has("the manifest lists");
}

#[test]
fn a_damaged_manifest_is_reported() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let mp = out.join("manifest.json");
    let good = std::fs::read(&mp).unwrap();
    // One changed digit.
    let at = good
        .iter()
        .enumerate()
        .skip(good.len() / 2)
        .find(|(_, b)| b.is_ascii_digit())
        .unwrap()
        .0;
    let mut bad = good.clone();
    bad[at] = if bad[at] == b'1' { b'2' } else { b'1' };
    std::fs::write(&mp, &bad).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has("manifest.json")
        .stderr_has("checksum mismatch in manifest");
    tamis(["verify", s(&mp)])
        .fails()
        .stderr_has("manifest.json");
    // Cut short.
    std::fs::write(&mp, &good[..good.len() / 2]).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has("manifest.json");
    // Not a manifest.
    std::fs::write(&mp, b"{}").unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has("manifest.json");
    // Gone.
    std::fs::remove_file(&mp).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has("no dataset here");
}

#[test]
fn a_manifest_that_lies_about_a_shard_is_caught() {
    // src/dataset/manifest.rs: the checksum is the xxh3-64 of the file with its
    // 16 hex digits replaced by '0'. Rewrite the row count of the first shard
    // entry and seal the manifest again, so that only the shard check can see
    // the lie.
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let mp = out.join("manifest.json");
    let text = std::fs::read_to_string(&mp).unwrap();
    let shards_at = text.find("\"shards\": [").unwrap();
    let rows_at = shards_at + text[shards_at..].find("\"rows\": ").unwrap() + "\"rows\": ".len();
    let digits = text[rows_at..].find(',').unwrap();
    let rows: u64 = text[rows_at..rows_at + digits].parse().unwrap();
    let mut edited = format!(
        "{}{}{}",
        &text[..rows_at],
        rows + 1,
        &text[rows_at + digits..]
    );
    let key = "\"checksum\": \"";
    let sum_at = edited.find(key).unwrap() + key.len();
    edited.replace_range(sum_at..sum_at + 16, "0000000000000000");
    let sum = format!("{:016x}", xxh3_64(edited.as_bytes()));
    edited.replace_range(sum_at..sum_at + 16, &sum);
    std::fs::write(&mp, &edited).unwrap();
    // The manifest itself is accepted...
    tamis(["verify", s(&mp)]).ok();
    // ...and the shard it misdescribes is named.
    let first = &manifest(&out).shards[0].file;
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has(&format!("damaged: {}", out.join(first).display()))
        .stderr_has(&format!("the manifest lists {} rows", rows + 1));
}

#[test]
fn a_damaged_document_frequency_file_is_reported() {
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let df = out.join(&manifest(&out).doc_freq[0].file);
    let mut bytes = std::fs::read(&df).unwrap();
    let (off, len) = section(&bytes, 1);
    bytes[off + len / 3] ^= 0x80;
    std::fs::write(&df, &bytes).unwrap();
    tamis(["verify", s(&out)])
        .fails()
        .stderr_has(&format!("damaged: {}", df.display()))
        .stderr_has("counts");
    tamis(["verify", s(&df)]).fails().stderr_has("counts");
}

#[test]
fn other_files_are_not_verified() {
    tamis(["verify", s(&fixture("inbox.tsv"))])
        .fails()
        .stderr_has("not a tamis file");
    let t = tmp();
    tamis(["verify", s(&t.path().join("nowhere"))])
        .fails()
        .stderr_has("nowhere");
    assert_eq!(tamis(["verify"]).code, Some(2));
}

#[test]
fn output_into_a_closed_pipe_is_a_quiet_success() {
    // src/main.rs: "Output piped into `head` and closed early: quiet success."
    let t = tmp();
    let out = t.path().join("d");
    dataset(&out, &[]);
    let (code, stderr) = tamis_closed_stdout(&["verify", s(&out)]);
    assert_eq!((code, stderr.as_str()), (Some(0), ""));
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["verify"]);
}
