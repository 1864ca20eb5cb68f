//! An invented message stream for demos, tests and benchmarks.
//!
//! The scenario is ours: the shared inbox of the *Quillmere Ferry Cooperative*, a
//! made-up passenger ferry service between the invented harbours of an invented
//! archipelago. Messages are one of six kinds: `spam`, `schedule`, `tickets`,
//! `lost_property`, `accessibility`, `feedback`.
//!
//! Each message mixes words drawn from a Zipf distribution over a shared
//! vocabulary (with generated filler words for a long tail) with words of its
//! kind; a fraction of labels is flipped (label noise); and over the stream the
//! spam vocabulary drifts from one word list to another (time-ordered drift), as
//! real spam campaigns do. Spam sometimes swaps letters for digits.
//! Output is deterministic for a seed.

use std::io::Write;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// The six kinds of message, in class order.
pub const LABELS: [&str; 6] = [
    "spam",
    "schedule",
    "tickets",
    "lost_property",
    "accessibility",
    "feedback",
];

const COMMON: &[&str] = &[
    "the", "a", "to", "and", "i", "you", "is", "of", "for", "on", "in", "my", "it", "this", "we",
    "please", "can", "with", "at", "be", "have", "was", "are", "would", "will", "from", "our",
    "your", "not", "me", "if", "there", "any", "do", "thanks", "hello", "hi", "regards", "just",
    "about", "when", "what", "could", "so", "but", "all", "one", "get", "know", "today",
    "tomorrow", "week", "morning", "evening", "again", "still", "also", "very", "much", "help",
];

const HARBOURS: &[&str] = &[
    "quillmere",
    "osk",
    "tarn",
    "pellow",
    "brackwater",
    "hollin",
    "marrow",
    "skerrin",
    "wendle",
    "fauna",
    "corrie",
    "dunmallow",
];

const TOPIC: [&[&str]; 6] = [
    // spam, early campaign
    &[
        "winner",
        "prize",
        "claim",
        "free",
        "offer",
        "click",
        "link",
        "bonus",
        "cash",
        "urgent",
        "congratulations",
        "selected",
        "reward",
        "limited",
        "voucher",
        "unlock",
        "guaranteed",
        "deal",
        "exclusive",
        "instantly",
    ],
    &[
        "timetable",
        "departure",
        "sailing",
        "delayed",
        "cancelled",
        "crossing",
        "schedule",
        "late",
        "early",
        "weather",
        "fog",
        "swell",
        "arrival",
        "time",
        "next",
        "last",
        "first",
        "pier",
        "route",
        "winter",
    ],
    &[
        "ticket",
        "booking",
        "refund",
        "fare",
        "return",
        "single",
        "pass",
        "season",
        "price",
        "charged",
        "twice",
        "card",
        "receipt",
        "reference",
        "change",
        "date",
        "child",
        "discount",
        "online",
        "paid",
    ],
    &[
        "lost", "left", "found", "bag", "umbrella", "phone", "wallet", "scarf", "keys", "jacket",
        "glasses", "seat", "deck", "cabin", "collect", "blue", "black", "backpack", "notebook",
        "gloves",
    ],
    &[
        "wheelchair",
        "ramp",
        "access",
        "assistance",
        "step",
        "lift",
        "mobility",
        "hearing",
        "loop",
        "guide",
        "dog",
        "seating",
        "boarding",
        "help",
        "carer",
        "buggy",
        "stairs",
        "accessible",
        "toilet",
        "scooter",
    ],
    &[
        "crew",
        "friendly",
        "thank",
        "great",
        "rude",
        "dirty",
        "clean",
        "coffee",
        "cafe",
        "view",
        "lovely",
        "complaint",
        "staff",
        "noisy",
        "comfortable",
        "suggestion",
        "improve",
        "enjoyed",
        "cold",
        "warm",
    ],
];

/// Spam words of the later campaign (drift).
const SPAM_LATE: &[&str] = &[
    "crypto",
    "wallet",
    "invest",
    "returns",
    "verify",
    "account",
    "suspended",
    "login",
    "password",
    "security",
    "alert",
    "confirm",
    "details",
    "profit",
    "trading",
    "signal",
    "double",
    "secure",
    "update",
    "payment",
];

/// Settings of the generator.
#[derive(Debug, Clone, PartialEq)]
pub struct SynthConfig {
    /// Seed.
    pub seed: u64,
    /// Probability that a label is replaced by a random one.
    pub label_noise: f64,
    /// Share of words taken from the message's topic list.
    pub topic_share: f64,
    /// Generated filler words in the long tail of the shared vocabulary.
    pub filler_words: usize,
    /// Relative frequency of each class, in [`LABELS`] order.
    pub class_weights: [f64; 6],
}

impl Default for SynthConfig {
    fn default() -> Self {
        SynthConfig {
            seed: 7,
            label_noise: 0.02,
            topic_share: 0.3,
            filler_words: 20_000,
            class_weights: [0.3, 0.2, 0.2, 0.1, 0.08, 0.12],
        }
    }
}

/// Cumulative weights for sampling by binary search.
struct Table(Vec<f64>);

impl Table {
    fn zipf(n: usize, s: f64) -> Table {
        Self::from_weights((1..=n).map(|k| 1.0 / (k as f64).powf(s)))
    }

    fn from_weights(w: impl Iterator<Item = f64>) -> Table {
        let mut acc = 0.0;
        let mut v: Vec<f64> = w
            .map(|x| {
                acc += x;
                acc
            })
            .collect();
        for x in &mut v {
            *x /= acc;
        }
        Table(v)
    }

    fn sample(&self, rng: &mut ChaCha8Rng) -> usize {
        let u: f64 = rng.random();
        self.0.partition_point(|&c| c < u).min(self.0.len() - 1)
    }
}

/// A generator of labelled messages.
pub struct Synth {
    cfg: SynthConfig,
    rng: ChaCha8Rng,
    vocab: Vec<String>,
    common: Table,
    topic: Table,
    classes: Table,
}

impl Synth {
    /// A generator for `cfg`.
    pub fn new(cfg: SynthConfig) -> Synth {
        let mut rng = ChaCha8Rng::seed_from_u64(cfg.seed);
        let mut vocab: Vec<String> = COMMON.iter().map(|s| s.to_string()).collect();
        vocab.extend(HARBOURS.iter().map(|s| s.to_string()));
        const SYL: &[&str] = &[
            "ka", "lo", "mer", "tin", "sa", "vo", "ril", "den", "qua", "bel", "os", "tar", "ny",
            "fen", "gra", "hul", "ip", "jor", "wex", "zu",
        ];
        while vocab.len() < COMMON.len() + HARBOURS.len() + cfg.filler_words {
            let n = rng.random_range(2..=4);
            let w: String = (0..n)
                .map(|_| SYL[rng.random_range(0..SYL.len())])
                .collect();
            vocab.push(w);
        }
        let common = Table::zipf(vocab.len(), 1.05);
        let topic = Table::zipf(20, 0.8);
        let classes = Table::from_weights(cfg.class_weights.iter().copied());
        Synth {
            cfg,
            rng,
            vocab,
            common,
            topic,
            classes,
        }
    }

    /// Write one message as `label<TAB>text` into `out`. `progress` in [0, 1]
    /// is the position in the stream (it drives the drift of spam words).
    /// Returns the true class (before label noise).
    pub fn message(&mut self, progress: f64, out: &mut Vec<u8>) -> usize {
        let class = self.classes.sample(&mut self.rng);
        let shown = if self.rng.random::<f64>() < self.cfg.label_noise {
            self.rng.random_range(0..LABELS.len())
        } else {
            class
        };
        out.extend_from_slice(LABELS[shown].as_bytes());
        out.push(b'\t');
        let len = 4 + (self.rng.random::<f64>().powi(2) * 30.0) as usize;
        for i in 0..len {
            if i > 0 {
                out.push(b' ');
            }
            let start = out.len();
            if self.rng.random::<f64>() < self.cfg.topic_share {
                let list = if class == 0 && self.rng.random::<f64>() < progress {
                    SPAM_LATE
                } else {
                    TOPIC[class]
                };
                out.extend_from_slice(list[self.topic.sample(&mut self.rng)].as_bytes());
            } else {
                let w = self.common.sample(&mut self.rng);
                out.extend_from_slice(self.vocab[w].as_bytes());
            }
            if i == 0 {
                out[start] = out[start].to_ascii_uppercase();
            }
            if class == 0 && self.rng.random::<f64>() < 0.05 {
                for b in &mut out[start..] {
                    *b = match *b {
                        b'e' => b'3',
                        b'o' => b'0',
                        b'i' => b'1',
                        other => other,
                    };
                }
            }
        }
        out.extend_from_slice(match self.rng.random_range(0..4) {
            0 => b".\n",
            1 => b"!\n",
            2 => b"?\n",
            _ => b"\n",
        });
        class
    }

    /// Write `rows` messages as TSV.
    pub fn write_rows(&mut self, rows: u64, out: &mut impl Write) -> std::io::Result<()> {
        let mut buf = Vec::with_capacity(1 << 16);
        for r in 0..rows {
            self.message(r as f64 / rows.max(1) as f64, &mut buf);
            if buf.len() >= 1 << 16 {
                out.write_all(&buf)?;
                buf.clear();
            }
        }
        out.write_all(&buf)
    }

    /// Write messages as TSV until at least `bytes` bytes are written.
    pub fn write_bytes(&mut self, bytes: u64, out: &mut impl Write) -> std::io::Result<u64> {
        let mut buf = Vec::with_capacity(1 << 16);
        let mut written = 0u64;
        while written < bytes {
            self.message(written as f64 / bytes as f64, &mut buf);
            if buf.len() >= 1 << 16 {
                out.write_all(&buf)?;
                written += buf.len() as u64;
                buf.clear();
            }
        }
        out.write_all(&buf)?;
        Ok(written + buf.len() as u64)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deterministic_and_well_formed() {
        let mut a = Vec::new();
        let mut b = Vec::new();
        Synth::new(SynthConfig::default())
            .write_rows(500, &mut a)
            .unwrap();
        Synth::new(SynthConfig::default())
            .write_rows(500, &mut b)
            .unwrap();
        assert_eq!(a, b);
        let text = String::from_utf8(a).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 500);
        for l in &lines {
            let (label, msg) = l.split_once('\t').unwrap();
            assert!(LABELS.contains(&label));
            assert!(msg.split(' ').count() >= 4);
        }
        // Every class appears.
        for l in LABELS {
            assert!(
                lines.iter().any(|x| x.starts_with(&format!("{l}\t"))),
                "{l}"
            );
        }
    }

    #[test]
    fn spam_vocabulary_drifts() {
        let mut s = Synth::new(SynthConfig::default());
        let late_share = |s: &mut Synth, p: f64| {
            let (mut late, mut all) = (0, 0);
            for _ in 0..3000 {
                let mut buf = Vec::new();
                if s.message(p, &mut buf) == 0 {
                    let t = String::from_utf8(buf).unwrap().to_lowercase();
                    all += 1;
                    late += t
                        .split(|c: char| !c.is_alphanumeric())
                        .filter(|w| SPAM_LATE.contains(w))
                        .count();
                }
            }
            late as f64 / all as f64
        };
        assert!(late_share(&mut s, 0.0) < 0.05);
        assert!(late_share(&mut s, 1.0) > 1.0);
    }
}
