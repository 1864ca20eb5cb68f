//! Parameter mixing: several replicas of a task's models, each trained on its
//! own share of the batches, replaced at fixed points by their mean.
//!
//! This is iterative parameter mixing (McDonald, Hall, Mann 2010, "Distributed
//! Training Strategies for the Structured Perceptron"; Zinkevich, Weimer,
//! Smola, Li 2010, "Parallelized Stochastic Gradient Descent"): replicas that
//! never share memory between mixing points scale with the cores, where a
//! single model's step is too short (a few microseconds) to split between
//! threads with profit.
//!
//! What is averaged, per model, is the current iterate `w = s·v` with its bias,
//! and the running sum of iterates `U + B·v` with the sum of biases, so that
//! after a mix the averaged iterate of every replica is the mean of the
//! replicas' averaged iterates. All replicas have taken the same number of
//! steps (see [`super::Trainer::hold`]), so the step counter and the number of
//! averaged steps are shared. Sums run over replicas in a fixed order and over
//! fixed pieces of the dimension, so a mix gives the same bits for any number
//! of threads.

use rayon::prelude::*;

use super::{Linear, Trainer};

/// Features per piece of a mix (the pieces run in parallel).
const PIECE: usize = 1 << 14;

/// Replace every replica's models by the mean of all replicas' models. One
/// replica (or none) is left as it is. Replicas must be of the same task and
/// dimension and have taken the same number of steps.
pub fn mix(replicas: &mut [Trainer]) {
    if replicas.len() < 2 {
        return;
    }
    debug_assert!(replicas.iter().all(|r| r.t == replicas[0].t));
    for k in 0..replicas[0].models.len() {
        let mut models: Vec<&mut Linear> = replicas.iter_mut().map(|r| &mut r.models[k]).collect();
        mix_models(&mut models);
    }
}

/// The mean of `models`, written into each of them (with `s = 1` and `B = 0`).
fn mix_models(models: &mut [&mut Linear]) {
    let r = models.len() as f64;
    let dim = models[0].v.len();
    debug_assert!(models.iter().all(|m| m.v.len() == dim));
    let scales: Vec<(f64, f64)> = models.iter().map(|m| (m.s, m.big_b)).collect();
    // Piece `p` of every replica's `v` and `U`, side by side.
    let mut pieces: Vec<Vec<(&mut [f64], &mut [f64])>> =
        (0..dim.div_ceil(PIECE)).map(|_| Vec::new()).collect();
    for m in models.iter_mut() {
        let Linear { v, u, .. } = &mut **m;
        for (p, (vp, up)) in v.chunks_mut(PIECE).zip(u.chunks_mut(PIECE)).enumerate() {
            pieces[p].push((vp, up));
        }
    }
    let norms: Vec<f64> = pieces
        .into_par_iter()
        .map(|mut piece| {
            let mut norm = 0.0;
            for j in 0..piece[0].0.len() {
                let (mut w, mut sum) = (0.0, 0.0);
                for ((v, u), &(s, big_b)) in piece.iter().zip(&scales) {
                    w += s * v[j];
                    sum += u[j] + big_b * v[j];
                }
                let (w, sum) = (w / r, sum / r);
                for (v, u) in piece.iter_mut() {
                    v[j] = w;
                    u[j] = sum;
                }
                norm += w * w;
            }
            norm
        })
        .collect();
    let vnorm2: f64 = norms.iter().sum();
    let b = models.iter().map(|m| m.b).sum::<f64>() / r;
    let bias_sum = models.iter().map(|m| m.bias_sum).sum::<f64>() / r;
    let averaged = models.iter().map(|m| m.averaged).max().unwrap_or(0);
    for m in models.iter_mut() {
        m.s = 1.0;
        m.big_b = 0.0;
        m.vnorm2 = vnorm2;
        m.b = b;
        m.bias_sum = bias_sum;
        m.averaged = averaged;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::solver::{Loss, MemRows, SolverConfig, Target};
    use rand::{Rng, SeedableRng};

    fn data(n: usize, dim: u32, seed: u64) -> MemRows {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut rows = MemRows::new();
        for _ in 0..n {
            let label = rng.random_range(0..3u32);
            let mut idx: Vec<u32> = (0..6).map(|_| rng.random_range(0..dim)).collect();
            idx.sort_unstable();
            idx.dedup();
            let vals: Vec<f32> = idx
                .iter()
                .map(|&i| if i % 3 == label { 1.0 } else { 0.3 })
                .collect();
            rows.push(label, &idx, &vals);
        }
        rows
    }

    fn trainer(dim: usize, classes: u32) -> Trainer {
        let cfg = SolverConfig {
            lambda: 1e-3,
            loss: Loss::Hinge,
            batch: 4,
            eta0: 1.0,
            project: false,
            average_from: 0,
        };
        Trainer::new(
            dim,
            (0..classes).map(Target::Class).collect(),
            vec![],
            cfg,
            None,
        )
        .unwrap()
    }

    /// After a mix every replica's current and averaged iterates are the means
    /// of the replicas' own (computed here from their plain weights), and the
    /// replicas are identical.
    #[test]
    fn mix_is_the_mean_of_current_and_averaged_iterates() {
        let dim = 1 << 15; // two pieces
        let rows = data(400, dim as u32, 3);
        let mut reps = vec![trainer(dim, 2), trainer(dim, 2), trainer(dim, 2)];
        for (r, t) in reps.iter_mut().enumerate() {
            t.set_solo(true);
            for s in 0..30 {
                let batch: Vec<usize> = (0..4).map(|i| (r * 131 + s * 4 + i) % 400).collect();
                t.step(&rows, &batch, s >= 5);
            }
        }
        // Per replica and model: current weights and bias, averaged ones.
        type Iterates = (Vec<f32>, f32, Vec<f32>, f32);
        let want: Vec<Vec<Iterates>> = reps
            .iter()
            .map(|t| {
                t.models
                    .iter()
                    .map(|m| {
                        let (w, b) = m.current();
                        let (a, ab) = m.averaged();
                        (w, b, a, ab)
                    })
                    .collect()
            })
            .collect();
        mix(&mut reps);
        for k in 0..2 {
            let (w, b) = reps[0].models[k].current();
            let (a, ab) = reps[0].models[k].averaged();
            for j in 0..dim {
                let mw = want.iter().map(|r| r[k].0[j] as f64).sum::<f64>() / 3.0;
                let ma = want.iter().map(|r| r[k].2[j] as f64).sum::<f64>() / 3.0;
                assert!(
                    (w[j] as f64 - mw).abs() <= 1e-6 * (1.0 + mw.abs()),
                    "w[{j}]"
                );
                assert!(
                    (a[j] as f64 - ma).abs() <= 1e-6 * (1.0 + ma.abs()),
                    "avg[{j}]"
                );
            }
            let mb = want.iter().map(|r| r[k].1 as f64).sum::<f64>() / 3.0;
            let mab = want.iter().map(|r| r[k].3 as f64).sum::<f64>() / 3.0;
            assert!((b as f64 - mb).abs() < 1e-6 && (ab as f64 - mab).abs() < 1e-6);
            let norm: f64 = w.iter().map(|&x| x as f64 * x as f64).sum();
            let kept = reps[0].models[k].vnorm2;
            assert!((norm - kept).abs() <= 1e-6 * norm.max(1e-12), "‖v‖² kept");
        }
        assert!(reps[1].models == reps[0].models && reps[2].models == reps[0].models);
    }

    /// Training on after a mix matches training a model built from the mixed
    /// weights: the scale and the lazy average are left consistent.
    #[test]
    fn training_continues_from_the_mix() {
        let dim = 1 << 10;
        let rows = data(300, dim as u32, 9);
        let mut reps = vec![trainer(dim, 1), trainer(dim, 1)];
        for (r, t) in reps.iter_mut().enumerate() {
            for s in 0..20 {
                let batch: Vec<usize> = (0..4).map(|i| (r * 97 + s * 4 + i) % 300).collect();
                t.step(&rows, &batch, true);
            }
        }
        mix(&mut reps);
        let before = reps[0].models[0].averaged();
        let steps_before = reps[0].models[0].averaged_steps() as f64;
        let (w0, b0) = reps[0].models[0].current();
        let mut a = reps[0].clone();
        for s in 0..10 {
            let batch: Vec<usize> = (0..4).map(|i| (s * 4 + i + 7) % 300).collect();
            a.step(&rows, &batch, true);
        }
        // Explicit: average = (K·before + Σ later iterates)/(K + 10), where the
        // later iterates come from the same steps on a fresh model at w0.
        let mut fresh = reps[0].clone();
        fresh.models[0] = Linear::from_weights(&w0, b0);
        let mut sum: Vec<f64> = before.0.iter().map(|&x| x as f64 * steps_before).collect();
        for s in 0..10 {
            let batch: Vec<usize> = (0..4).map(|i| (s * 4 + i + 7) % 300).collect();
            fresh.step(&rows, &batch, false);
            let (w, _) = fresh.models[0].current();
            for (acc, x) in sum.iter_mut().zip(w) {
                *acc += x as f64;
            }
        }
        let (got, _) = a.models[0].averaged();
        for j in 0..dim {
            let want = sum[j] / (steps_before + 10.0);
            assert!(
                (got[j] as f64 - want).abs() <= 1e-5 * (1.0 + want.abs()),
                "{j}"
            );
        }
        let (cur_a, _) = a.models[0].current();
        let (cur_f, _) = fresh.models[0].current();
        for j in 0..dim {
            assert!((cur_a[j] - cur_f[j]).abs() <= 1e-5 * (1.0 + cur_f[j].abs()));
        }
    }

    /// One replica is left bit for bit as it was; a hold keeps step counts
    /// equal and adds the current iterate to the average once more.
    #[test]
    fn single_replica_and_hold() {
        let dim = 1 << 10;
        let rows = data(100, dim as u32, 1);
        let mut one = vec![trainer(dim, 1)];
        one[0].step(&rows, &[1, 2, 3, 4], true);
        let kept = one[0].models.clone();
        mix(&mut one);
        assert!(one[0].models == kept);
        let (w, b) = one[0].models[0].current();
        let (avg, ab) = one[0].models[0].averaged();
        one[0].hold(true);
        assert_eq!(one[0].t, 2);
        let (avg2, ab2) = one[0].models[0].averaged();
        assert_eq!(one[0].models[0].current(), (w.clone(), b));
        for j in 0..dim {
            let want = (avg[j] as f64 + w[j] as f64) / 2.0;
            assert!((avg2[j] as f64 - want).abs() <= 1e-6 * (1.0 + want.abs()));
        }
        assert!((ab2 as f64 - (ab as f64 + b as f64) / 2.0).abs() < 1e-6);
    }
}
