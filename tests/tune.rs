//! `tamis tune`: every λ × loss trained in one pass; the choice must be the one
//! separate runs of `tamis train` would lead to.

mod common;

use std::path::{Path, PathBuf};

use common::*;

fn dataset(t: &Path, extra: &[&str]) -> PathBuf {
    let tsv = t.join("inbox.tsv");
    synth_tsv(&tsv, 12000, 4);
    let ds = t.join("ds");
    let mut args = vec!["--log2-buckets", "14", "-q"];
    args.extend_from_slice(extra);
    ingest(&[&tsv], &ds, &args).ok();
    ds
}

fn tune_json(ds: &Path, model: &Path, extra: &[&str]) -> serde_json::Value {
    let mut args = vec!["tune", s(ds), "--model", s(model), "--json"];
    args.extend_from_slice(extra);
    let o = tamis(&args);
    o.ok();
    serde_json::from_str(&o.stdout).unwrap_or_else(|e| panic!("{e}\n{}", o.stdout))
}

/// On data where the right λ is clear (a λ of 1e-2 shrinks the weights far too
/// much), tune picks the λ that separate training runs would: each trained by
/// `tamis train`, calibrated by `tamis calibrate` (Platt scaling on the
/// validation split) and measured by `tamis eval`, an independent path to the
/// same validation log loss. The candidates' figures agree with the separate
/// runs' up to rounding (the lanes sum in another order than a lone model).
#[test]
fn tune_picks_what_separate_runs_would() {
    let t = tmp();
    let ds = dataset(t.path(), &[]);
    let lambdas = ["1e-2", "1e-4", "1e-6"];
    let best = t.path().join("best.tmm");
    let kept = t.path().join("kept");
    let v = tune_json(
        &ds,
        &best,
        &[
            "--lambdas",
            &lambdas.join(","),
            "--epochs",
            "3",
            "--keep",
            s(&kept),
        ],
    );
    assert_eq!(v["metric"], "log-loss");
    let cands = v["candidates"].as_array().unwrap();
    assert_eq!(cands.len(), 3);
    let mut separate = Vec::new();
    for (l, c) in lambdas.iter().zip(cands) {
        let m = t.path().join(format!("{l}.tmm"));
        train(&ds, &m, &["--lambda", l, "--epochs", "3", "-q"]).ok();
        let acc = eval_json(&m, &[s(&ds)], &[])["accuracy"].as_f64().unwrap();
        let tuned = c["accuracy"].as_f64().unwrap();
        assert!(
            (acc - tuned).abs() <= 0.002,
            "λ {l}: separate {acc}, tuned {tuned}"
        );
        tamis(["calibrate", s(&m), s(&ds)]).ok();
        let ll = eval_json(&m, &[s(&ds)], &[])["log_loss"].as_f64().unwrap();
        let tuned_ll = c["log_loss"].as_f64().unwrap();
        assert!(
            (ll - tuned_ll).abs() <= 1e-3 * ll,
            "λ {l}: separate log loss {ll}, tuned {tuned_ll}"
        );
        separate.push((acc, ll));
        // The kept model's weights are the separate run's, up to rounding.
        let kw = f32_section(
            &std::fs::read(c["model"].as_str().unwrap()).unwrap(),
            MODEL_WEIGHTS,
        );
        let sw = f32_section(&std::fs::read(&m).unwrap(), MODEL_WEIGHTS);
        assert_eq!(kw.len(), sw.len());
        let worst = kw
            .iter()
            .zip(&sw)
            .map(|(a, b)| (a - b).abs() / (1e-3 + b.abs()))
            .fold(0.0f32, f32::max);
        assert!(worst < 1e-3, "λ {l}: weights differ by {worst} (relative)");
    }
    let min_ll = separate.iter().map(|x| x.1).fold(f64::INFINITY, f64::min);
    let picked = v["best"].as_u64().unwrap() as usize;
    // The pick is the separate runs' best, or ties with it to 1e-4 (then the
    // order of rounding may decide).
    assert!(
        separate[picked].1 <= min_ll + 1e-4,
        "picked {picked}: {separate:?}"
    );
    assert_ne!(picked, 0, "{separate:?}");
    assert!(
        separate[0].0 < separate[1].0 - 0.01,
        "the fixture should make 1e-2 clearly worse: {separate:?}"
    );
    // By accuracy, the same agreement.
    let va = tune_json(
        &ds,
        &best,
        &[
            "--lambdas",
            &lambdas.join(","),
            "--epochs",
            "3",
            "--metric",
            "accuracy",
        ],
    );
    let max_acc = separate.iter().map(|x| x.0).fold(0.0, f64::max);
    let pa = va["best"].as_u64().unwrap() as usize;
    assert!(
        separate[pa].0 >= max_acc - 0.002,
        "picked {pa}: {separate:?}"
    );
    // The best model is complete: it verifies and records its λ.
    tamis(["verify", s(&best)]).ok();
    let meta = model_meta(&best);
    assert_eq!(
        meta["training"]["solver"]["lambda"],
        lambdas.map(|l| l.parse::<f64>().unwrap())[pa]
    );
}

/// Several losses: candidates are losses × λ, losses outer; the models do not
/// depend on the thread count; the output is the same from run to run.
#[test]
fn losses_times_lambdas_deterministic_for_any_threads() {
    let t = tmp();
    let ds = dataset(t.path(), &["--positive", "spam"]);
    let a = t.path().join("a.tmm");
    let b = t.path().join("b.tmm");
    let args = [
        "--lambdas",
        "1e-3,1e-5",
        "--losses",
        "hinge,logistic",
        "--epochs",
        "2",
    ];
    let mut one = args.to_vec();
    one.extend(["-j", "1"]);
    let mut two = args.to_vec();
    two.extend(["-j", "2", "--metric", "hinge-loss"]);
    let v1 = tune_json(&ds, &a, &one);
    tune_json(&ds, &b, &two);
    let c = v1["candidates"].as_array().unwrap();
    let pairs: Vec<(String, f64)> = c
        .iter()
        .map(|x| {
            (
                x["loss"].as_str().unwrap().to_string(),
                x["lambda"].as_f64().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        pairs,
        vec![
            ("hinge".into(), 1e-3),
            ("hinge".into(), 1e-5),
            ("logistic".into(), 1e-3),
            ("logistic".into(), 1e-5)
        ]
    );
    for x in c {
        for key in ["log_loss", "accuracy", "macro_f1", "hinge_loss", "score"] {
            assert!(x[key].as_f64().is_some(), "{key} in {x}");
        }
    }
    // Same candidates with another thread count and metric: same numbers.
    let v2 = tune_json(&ds, &b, &two);
    for (x, y) in c.iter().zip(v2["candidates"].as_array().unwrap()) {
        assert_eq!(x["accuracy"], y["accuracy"]);
        assert_eq!(x["hinge_loss"], y["hinge_loss"]);
    }
    let again = t.path().join("again.tmm");
    tune_json(&ds, &again, &one);
    assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&again).unwrap());
}

#[test]
fn bad_requests_are_refused() {
    let t = tmp();
    let ds = dataset(t.path(), &[]);
    let m = t.path().join("m.tmm");
    let run = |extra: &[&str]| {
        let mut args = vec!["tune", s(&ds), "--model", s(&m)];
        args.extend_from_slice(extra);
        tamis(&args)
    };
    run(&["--lambdas", "1e-4,0"])
        .fails()
        .stderr_has("--lambda must be a positive number");
    run(&["--lambdas", "1e-4,1e-4"])
        .fails()
        .stderr_has("asked for twice");
    run(&["--epochs", "0"])
        .fails()
        .stderr_has("--epochs must be at least 1");
    assert!(!m.exists());
    let tsv = t.path().join("inbox.tsv");
    let nv = t.path().join("no-validation");
    ingest(&[&tsv], &nv, &["--validation", "0", "-q"]).ok();
    tamis(["tune", s(&nv), "--model", s(&m)])
        .fails()
        .stderr_has("has none; ingest with --validation above 0");
}

#[test]
fn help_explains_every_option() {
    assert_help_explains_everything(&["tune"]);
}
