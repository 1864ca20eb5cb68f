//! Checkpoint files: the whole state of a training run, so it can stop anywhere
//! and resume exactly.
//!
//! A [`crate::container`] file of kind 4, format version [`VERSION`]. Header
//! parameters: models `M`, dimension `D`, 1 if idf factors are stored, 0.
//! Sections:
//!
//! | id | name      | contents                                                    |
//! |----|-----------|-------------------------------------------------------------|
//! | 1  | `meta`    | UTF-8 JSON [`CheckpointMeta`]: settings, dataset, position, log |
//! | 2  | `v`       | `f64`, `M × D`: the scaled iterate `v` of every model (`w = s·v`) |
//! | 3  | `u`       | `f64`, `M × D`: the lazy average's `U` of every model        |
//! | 4  | `scalars` | `u64`, `M × 6`: bits of `s`, `b`, `‖v‖²`, `B`, `Σb` as `f64`, then the averaged step count |
//! | 5  | `idf`     | `f32`, `D` (only when training with idf)                     |
//!
//! The order of rows in an epoch is a pure function of the seed and the position
//! `(epoch, group, rows taken)` (see [`crate::solver::order`]), so the position
//! stands in for the random generators' state. Floating-point values in the JSON
//! metadata round-trip exactly (serde_json's `float_roundtrip`), and the solver
//! state is stored bit for bit, so a resumed run continues exactly where the
//! interrupted one stopped.
//!
//! Written atomically (temporary file, fsync, rename, fsync of the folder): a
//! crash during a write leaves the previous checkpoint intact.

use std::path::{Path, PathBuf};
use std::time::Instant;

use serde::{Deserialize, Serialize};

use crate::container::{self, cast_section, Container, ContainerWriter, Kind};
use crate::dataset::Split;
use crate::error::{Error, Result};
use crate::features::FeatureConfig;
use crate::model::{EpochLog, TrainSettings};
use crate::solver::Linear;

/// Current checkpoint format version.
pub const VERSION: u32 = 1;
const SEC_META: u32 = 1;
const SEC_V: u32 = 2;
const SEC_U: u32 = 3;
const SEC_SCALARS: u32 = 4;
const SEC_IDF: u32 = 5;
/// Scalars stored per model.
const SCALARS: usize = 6;
/// A step count no run reaches (2^53: a billion steps a second for over a
/// hundred days), below which `f64` counts steps exactly and `u64` never wraps.
const MAX_STEP: u64 = 1 << 53;

fn section_name(id: u32) -> String {
    match id {
        SEC_META => "meta".into(),
        SEC_V => "v".into(),
        SEC_U => "u".into(),
        SEC_SCALARS => "scalars".into(),
        SEC_IDF => "idf".into(),
        other => format!("unknown section {other}"),
    }
}

/// Where a run stands: the next row to read is row `taken` of group `group` of
/// epoch `epoch` (all from 0); `step` steps have been taken in all.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Position {
    /// Epoch in progress (0-based); equal to the number of epochs when done.
    pub epoch: u32,
    /// Group of shards in progress inside the epoch.
    pub group: u32,
    /// Rows already taken from that group.
    pub taken: u64,
    /// Solver steps taken so far (the step counter `t`).
    pub step: u64,
    /// Rounds of steps the replicas have taken since they last mixed (0 with
    /// one replica, and at every epoch end).
    #[serde(default)]
    pub since_mix: u64,
}

/// A shard in use by the run, as the manifest listed it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardRef {
    /// File name inside the dataset folder.
    pub file: String,
    /// Which split.
    pub split: Split,
    /// The shard's header checksum (hex), as in the manifest.
    pub checksum: String,
}

/// Sums of the epoch in progress (the epoch's objective estimate uses them).
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct EpochSums {
    /// Sum of weighted losses seen so far in the epoch.
    pub loss: f64,
    /// Rows seen so far in the epoch.
    pub rows: u64,
    /// Nonzeros seen so far in the epoch.
    pub nnz: u64,
}

impl EpochSums {
    /// Add what a step saw.
    pub fn add(&mut self, t: &crate::solver::Tally) {
        self.loss += t.loss;
        self.rows += t.rows;
        self.nnz += t.nnz;
    }
}

/// Early-stopping state.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct EarlyStop {
    /// Best validation loss so far (`None` before the first epoch ends).
    pub best_loss: Option<f64>,
    /// Epochs since the best.
    pub since_best: u32,
}

/// The metadata section of a checkpoint.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CheckpointMeta {
    /// Always `tamis-checkpoint`.
    pub format: String,
    /// The tamis version that wrote it.
    pub written_by: String,
    /// The dataset folder (absolute).
    pub dataset: PathBuf,
    /// The model file the run writes (absolute).
    pub model: PathBuf,
    /// Fingerprint of the dataset's manifest when the run (or its last epoch) began.
    pub dataset_fingerprint: String,
    /// Hashing and tokenizing settings of the dataset.
    pub features: FeatureConfig,
    /// Label dictionary of the dataset (position = class id).
    pub labels: Vec<String>,
    /// The positive class id of a binary task; `None` for one-vs-rest.
    pub positive: Option<u32>,
    /// Shards in use by the epoch in progress, in manifest order.
    pub shards: Vec<ShardRef>,
    /// Settings (those of a model file, which the run writes at its end).
    pub settings: TrainSettings,
    /// Where the run stands.
    pub position: Position,
    /// Sums of the epoch in progress.
    pub epoch_sums: EpochSums,
    /// Early-stopping state.
    pub early_stop: EarlyStop,
    /// Log of the finished epochs.
    pub epochs: Vec<EpochLog>,
    /// A distributed run's position of every rank in its share of the epoch,
    /// in rank order (empty for a run on one process); `position` is rank
    /// 0's. A run resumed with as many ranks continues each from here.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub rank_positions: Vec<RankPosition>,
    /// The rules of the epoch order the positions refer to
    /// ([`crate::solver::order::ORDER_VERSION`]; 0, absent, in checkpoints
    /// written before the rules had a version).
    #[serde(default)]
    pub epoch_order: u32,
}

/// Where one rank of a distributed run stands in its share of an epoch.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct RankPosition {
    /// Group of shards in progress inside the rank's share.
    pub group: u32,
    /// Rows already taken from that group.
    pub taken: u64,
    /// What the rank has seen of the epoch so far (so that the epoch's sums add
    /// up in the same order as in a run never interrupted).
    pub sums: EpochSums,
}

/// A checkpoint in memory.
#[derive(Debug, Clone, PartialEq)]
pub struct Checkpoint {
    /// Metadata.
    pub meta: CheckpointMeta,
    /// The models' complete solver state.
    pub models: Vec<Linear>,
    /// idf factors, when training with them.
    pub idf: Option<Vec<f32>>,
}

/// What writing a checkpoint cost.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WriteCost {
    /// Bytes of the file.
    pub bytes: u64,
    /// Seconds from start to the synced rename.
    pub seconds: f64,
}

impl Checkpoint {
    /// Write atomically to `path` (temporary file, fsync, rename, folder fsync).
    pub fn save(&self, path: &Path) -> Result<WriteCost> {
        let models: Vec<&Linear> = self.models.iter().collect();
        Self::write(path, &self.meta, &models, self.idf.as_deref())
    }

    /// Write a checkpoint from borrowed parts (saves copying the weights).
    pub fn write(
        path: &Path,
        meta: &CheckpointMeta,
        models: &[&Linear],
        idf: Option<&[f32]>,
    ) -> Result<WriteCost> {
        let start = Instant::now();
        let dim = models.first().map_or(0, |m| m.dim());
        if models.is_empty() || models.iter().any(|m| m.dim() != dim) {
            return Err(Error::Invalid(
                "internal: a checkpoint needs models of one dimension".into(),
            ));
        }
        let json = serde_json::to_vec_pretty(meta).expect("metadata serialises");
        let mut w = ContainerWriter::create(path, Kind::Checkpoint, VERSION, 5)?;
        w.section(SEC_META, &json)?;
        for (id, pick) in [(SEC_V, 0usize), (SEC_U, 1)] {
            let mut s = w.begin_stream()?;
            for m in models {
                let (v, u, _, _) = m.state();
                let part = if pick == 0 { v } else { u };
                w.stream(&mut s, bytemuck::cast_slice(part))?;
            }
            w.end_stream(id, s)?;
        }
        let mut scalars = Vec::with_capacity(models.len() * SCALARS);
        for m in models {
            let (_, _, sc, averaged) = m.state();
            scalars.extend(sc.iter().map(|x| x.to_bits()));
            scalars.push(averaged);
        }
        w.section(SEC_SCALARS, bytemuck::cast_slice(&scalars))?;
        if let Some(idf) = idf {
            w.section(SEC_IDF, bytemuck::cast_slice(idf))?;
        }
        w.set_params([models.len() as u64, dim as u64, idf.is_some() as u64, 0]);
        w.finish()?;
        let bytes = std::fs::metadata(path).map(|m| m.len()).unwrap_or(0);
        Ok(WriteCost {
            bytes,
            seconds: start.elapsed().as_secs_f64(),
        })
    }

    /// Load and fully check a checkpoint file.
    pub fn load(path: &Path) -> Result<Checkpoint> {
        let c = open(path)?;
        c.verify(section_name)?;
        Self::from_container(&c)
    }

    /// Load a checkpoint from its bytes (read elsewhere: a distributed run's
    /// rank 0 reads the file and sends it to the others); `path` names it in
    /// messages. The same checks as [`Checkpoint::load`].
    pub fn from_bytes(bytes: &[u8], path: &Path) -> Result<Checkpoint> {
        let c = Container::parse(bytes, path, Kind::Checkpoint, VERSION..=VERSION)?;
        c.verify(section_name)?;
        Self::from_container(&c)
    }

    /// Check every checksum and the structure; for `tamis verify`.
    pub fn verify(path: &Path) -> Result<CheckpointMeta> {
        Ok(Self::load(path)?.meta)
    }

    fn from_container<B: AsRef<[u8]>>(c: &Container<B>) -> Result<Checkpoint> {
        let path = c.path();
        let bad = |what: String| Error::Corrupt {
            path: path.to_path_buf(),
            what,
        };
        let meta: CheckpointMeta = serde_json::from_slice(c.section(SEC_META, "meta")?)
            .map_err(|e| bad(format!("bad checkpoint metadata: {e}")))?;
        if meta.format != "tamis-checkpoint" {
            return Err(bad(format!(
                "format {:?} is not tamis-checkpoint",
                meta.format
            )));
        }
        meta.features.validate().map_err(|e| bad(e.to_string()))?;
        meta.settings
            .solver
            .validate()
            .map_err(|e| bad(e.to_string()))?;
        let [m, d, has_idf, _] = c.header().params;
        let dim = meta.features.buckets() as u64;
        // Every replica's models, one replica after the other.
        let want_models = match meta.positive {
            Some(_) => 1,
            None => meta.labels.len() as u64,
        } * u64::from(meta.settings.replicas.max(1));
        if d != dim || m != want_models || m == 0 {
            return Err(bad(format!(
                "header says {m} model(s) of {d} features; the metadata needs {want_models} of {dim}"
            )));
        }
        if meta.settings.class_weights.len() != meta.labels.len() {
            return Err(bad("class weights do not match the labels".into()));
        }
        // What `train` itself would never write: weights that are not positive
        // numbers, or a step count no run reaches (it would wrap around).
        if !meta
            .settings
            .class_weights
            .iter()
            .all(|w| *w > 0.0 && w.is_finite())
        {
            return Err(bad("class weights are not all positive numbers".into()));
        }
        if meta.position.step >= MAX_STEP {
            return Err(bad(format!(
                "step count {} is beyond any run's",
                meta.position.step
            )));
        }
        let (m, d) = (m as usize, d as usize);
        let v: &[f64] = cast_section(c.section(SEC_V, "v")?, path, "v")?;
        let u: &[f64] = cast_section(c.section(SEC_U, "u")?, path, "u")?;
        let sc: &[u64] = cast_section(c.section(SEC_SCALARS, "scalars")?, path, "scalars")?;
        for (name, len, want) in [
            ("v", v.len(), m * d),
            ("u", u.len(), m * d),
            ("scalars", sc.len(), m * SCALARS),
        ] {
            if len != want {
                return Err(Error::Size {
                    path: path.to_path_buf(),
                    what: format!("section {name}"),
                    expected: (want * 8) as u64,
                    got: (len * 8) as u64,
                });
            }
        }
        let idf = match has_idf {
            0 => None,
            1 => {
                let s: &[f32] = cast_section(c.section(SEC_IDF, "idf")?, path, "idf")?;
                if s.len() != d {
                    return Err(bad("idf section has the wrong length".into()));
                }
                if s.iter().any(|v| !v.is_finite()) {
                    return Err(bad("idf factors are not finite".into()));
                }
                Some(s.to_vec())
            }
            other => return Err(bad(format!("idf flag {other} is neither 0 nor 1"))),
        };
        if idf.is_some() != meta.settings.idf {
            return Err(bad("idf section and settings disagree".into()));
        }
        let models: Vec<Linear> = (0..m)
            .map(|k| {
                let s = &sc[k * SCALARS..(k + 1) * SCALARS];
                let scalars = [0, 1, 2, 3, 4].map(|i| f64::from_bits(s[i]));
                Linear::from_state(
                    &v[k * d..(k + 1) * d],
                    &u[k * d..(k + 1) * d],
                    scalars,
                    s[5],
                )
            })
            .collect();
        if models.iter().any(|l| {
            let (v, u, sc, _) = l.state();
            v.iter().chain(u).chain(&sc).any(|x| !x.is_finite())
        }) {
            return Err(bad("solver state is not finite".into()));
        }
        Ok(Checkpoint { meta, models, idf })
    }
}

fn open(path: &Path) -> Result<Container<container::FileBytes>> {
    Container::parse(
        container::map_file(path)?,
        path,
        Kind::Checkpoint,
        VERSION..=VERSION,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    pub(crate) fn sample() -> Checkpoint {
        let features = FeatureConfig::plain(7, 10);
        let d = 1 << 10;
        let models = (0..3)
            .map(|k| {
                let v: Vec<f64> = (0..d).map(|i| (i * (k + 1)) as f64 * 0.1 - 3.0).collect();
                let u: Vec<f64> = (0..d).map(|i| 1.0 / (1.0 + i as f64)).collect();
                Linear::from_state(&v, &u, [0.5, -0.25, 12.0, 3.0, 0.125], 17 + k as u64)
            })
            .collect();
        Checkpoint {
            meta: CheckpointMeta {
                format: "tamis-checkpoint".into(),
                written_by: "test".into(),
                dataset: "/data/ferry".into(),
                model: "/data/ferry.tmm".into(),
                dataset_fingerprint: "0123456789abcdef".into(),
                features,
                labels: vec!["a".into(), "b".into(), "c".into()],
                positive: None,
                shards: vec![ShardRef {
                    file: "train-000000.tms".into(),
                    split: Split::Train,
                    checksum: "00000000000000ff".into(),
                }],
                settings: TrainSettings {
                    solver: crate::train::TrainOptions::defaults(
                        std::path::Path::new("ds"),
                        std::path::Path::new("m.tmm"),
                    )
                    .solver,
                    epochs: 5,
                    seed: 9,
                    class_weights: vec![1.0, 0.1 + 0.2, 1.0 / 3.0],
                    class_weight_rule: "none".into(),
                    idf: true,
                    patience: Some(2),
                    init_from: Some(crate::model::WarmStart {
                        model: "yesterday.tmm".into(),
                        steps: 123,
                    }),
                    replicas: 1,
                    sync_every: 0,
                    ranks: 3,
                },
                position: Position {
                    epoch: 1,
                    group: 2,
                    taken: 300,
                    step: 9999,
                    since_mix: 0,
                },
                epoch_sums: EpochSums {
                    loss: 0.1 + 0.7,
                    rows: 5,
                    nnz: 50,
                },
                early_stop: EarlyStop {
                    best_loss: Some(std::f64::consts::PI),
                    since_best: 1,
                },
                epochs: vec![],
                rank_positions: vec![
                    RankPosition {
                        group: 2,
                        taken: 300,
                        sums: EpochSums {
                            loss: 0.1 + 0.2,
                            rows: 2,
                            nnz: 20,
                        },
                    },
                    RankPosition {
                        group: 0,
                        taken: 64,
                        sums: EpochSums {
                            loss: 0.5,
                            rows: 3,
                            nnz: 30,
                        },
                    },
                    RankPosition {
                        group: 3,
                        taken: 0,
                        sums: EpochSums::default(),
                    },
                ],
                epoch_order: crate::solver::order::ORDER_VERSION,
            },
            models,
            idf: Some((0..d).map(|i| 1.0 + i as f32 / 7.0).collect()),
        }
    }

    #[test]
    fn round_trip_is_exact() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("run.tmc");
        let ck = sample();
        let cost = ck.save(&p).unwrap();
        assert_eq!(cost.bytes, std::fs::metadata(&p).unwrap().len());
        let back = Checkpoint::load(&p).unwrap();
        assert_eq!(back, ck);
        // Values that do not print exactly in decimal come back bit for bit.
        assert_eq!(
            back.meta.settings.class_weights[1].to_bits(),
            (0.1f64 + 0.2).to_bits()
        );
        // No temporary file is left behind.
        let names: Vec<_> = std::fs::read_dir(dir.path()).unwrap().collect();
        assert_eq!(names.len(), 1);
    }

    #[test]
    fn damage_is_caught_with_the_section_named() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("run.tmc");
        sample().save(&p).unwrap();
        let good = std::fs::read(&p).unwrap();
        let c = Container::parse(
            container::AlignedBytes::from_slice(&good),
            &p,
            Kind::Checkpoint,
            VERSION..=VERSION,
        )
        .unwrap();
        for s in &c.header().sections {
            let mut bytes = good.clone();
            bytes[(s.offset + s.len / 2) as usize] ^= 0x10;
            std::fs::write(&p, &bytes).unwrap();
            match Checkpoint::load(&p) {
                Err(Error::Checksum { section, .. }) => assert_eq!(section, section_name(s.id)),
                other => panic!("section {}: {other:?}", s.id),
            }
        }
        std::fs::write(&p, &good[..good.len() - 100]).unwrap();
        assert!(matches!(Checkpoint::load(&p), Err(Error::Size { .. })));
        // A newer version, with the header checksum made to fit.
        let mut bytes = good.clone();
        bytes[12] = 99;
        let table_end = 64 + 32 * c.header().sections.len();
        let sum = xxhash_rust::xxh3::xxh3_64(&bytes[..table_end]);
        bytes[table_end..table_end + 8].copy_from_slice(&sum.to_le_bytes());
        std::fs::write(&p, &bytes).unwrap();
        assert!(matches!(
            Checkpoint::load(&p),
            Err(Error::Version { got: 99, .. })
        ));
        // A model file is not a checkpoint.
        let mut bytes = good;
        bytes[8] = 3;
        std::fs::write(&p, &bytes).unwrap();
        assert!(Checkpoint::load(&p).is_err());
    }
}
