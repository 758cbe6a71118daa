//! Sharded runs, merged, against the single run on the same invented logits.
//!
//! The data: a fictional model "Wren-7" and two invented compressed twins,
//! written as safetensors from this test. Each check runs the built binary:
//! once over everything, then three shard processes and a merge. Counts,
//! means and intervals must agree to 1e-12 (relative), percentiles within the
//! sketch's 1% promise, worst positions exactly, gates and exit code
//! exactly. The reference numbers are the single run's exact ones (sorted
//! values, numpy's linear percentile rule), checked elsewhere against numpy.

use safetensors::tensor::TensorView;
use safetensors::Dtype;
use serde_json::Value;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

const BIN: &str = env!("CARGO_BIN_EXE_klgauge");

/// SplitMix64 (Steele, Lea and Flood 2014; common practice).
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn uniform(&mut self) -> f64 {
        ((self.next() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    /// Box-Muller (common practice).
    fn normal(&mut self) -> f64 {
        let (a, b) = (self.uniform(), self.uniform());
        (-2.0 * a.ln()).sqrt() * (std::f64::consts::TAU * b).cos()
    }
}

struct Scratch(PathBuf);

impl Scratch {
    fn new(name: &str) -> Scratch {
        let d = std::env::temp_dir().join(format!("klgauge-shard-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        Scratch(d)
    }
    fn path(&self, f: &str) -> PathBuf {
        self.0.join(f)
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        // KLGAUGE_TEST_KEEP=1 keeps the generated files for inspection.
        if std::env::var_os("KLGAUGE_TEST_KEEP").is_some() {
            return;
        }
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

#[allow(clippy::too_many_arguments)]
fn write_logits(
    path: &Path,
    dtype: Dtype,
    logits: &[f32],
    rows: usize,
    vocab: usize,
    targets: &[i64],
    mask: &[u8],
    offsets: &[i64],
    model: &str,
) {
    let bytes: Vec<u8> = match dtype {
        Dtype::F32 => logits.iter().flat_map(|v| v.to_le_bytes()).collect(),
        Dtype::BF16 => logits
            .iter()
            .flat_map(|&v| half::bf16::from_f32(v).to_le_bytes())
            .collect(),
        _ => unreachable!(),
    };
    let t: Vec<u8> = targets.iter().flat_map(|v| v.to_le_bytes()).collect();
    let o: Vec<u8> = offsets.iter().flat_map(|v| v.to_le_bytes()).collect();
    let tensors = vec![
        (
            "logits",
            TensorView::new(dtype, vec![rows, vocab], &bytes).unwrap(),
        ),
        (
            "mask",
            TensorView::new(Dtype::U8, vec![rows], mask).unwrap(),
        ),
        (
            "prompt_offsets",
            TensorView::new(Dtype::I64, vec![offsets.len()], &o).unwrap(),
        ),
        (
            "targets",
            TensorView::new(Dtype::I64, vec![rows], &t).unwrap(),
        ),
    ];
    let meta = HashMap::from([("model".to_string(), model.to_string())]);
    safetensors::serialize_to_file(tensors, Some(meta), path).unwrap();
}

/// An invented scenario: 45 prompts of 10 to 49 tokens over a 200-token
/// vocabulary; candidate "a" is a light perturbation (F32), candidate "b" a
/// heavier one stored in BF16, worse on every fifth prompt, with one NaN row
/// and one token the reference allows that it rules out (infinite kl).
fn make_inputs(dir: &Scratch, seed: u64, with_faults: bool) -> (PathBuf, PathBuf, PathBuf) {
    make_inputs_sized(dir, seed, with_faults, 45, 200)
}

fn make_inputs_sized(
    dir: &Scratch,
    seed: u64,
    with_faults: bool,
    prompts: usize,
    vocab: usize,
) -> (PathBuf, PathBuf, PathBuf) {
    let mut rng = Rng(seed);
    let lens: Vec<usize> = (0..prompts)
        .map(|_| 10 + (rng.next() % 40) as usize)
        .collect();
    let mut offsets = vec![0i64];
    for l in &lens {
        offsets.push(offsets.last().unwrap() + *l as i64);
    }
    let rows = *offsets.last().unwrap() as usize;
    let (mut r, mut a, mut b) = (
        vec![0f32; rows * vocab],
        vec![0f32; rows * vocab],
        vec![0f32; rows * vocab],
    );
    let mut targets = vec![0i64; rows];
    let mut mask = vec![1u8; rows];
    for (p, w) in offsets.windows(2).enumerate() {
        let hard = if p % 5 == 0 { 4.0 } else { 1.0 };
        let sharp = 1.0 + 3.0 * rng.uniform();
        for row in w[0] as usize..w[1] as usize {
            let peak = (rng.next() % vocab as u64) as usize;
            for c in 0..vocab {
                let base = 2.0 * rng.normal() + if c == peak { 4.0 * sharp } else { 0.0 };
                r[row * vocab + c] = base as f32;
                a[row * vocab + c] = (base + 0.02 * rng.normal()) as f32;
                b[row * vocab + c] = (base + 0.15 * hard * rng.normal() + 8.0) as f32;
            }
            targets[row] = if row + 1 == w[1] as usize {
                -1
            } else if rng.uniform() < 0.6 {
                peak as i64
            } else {
                (rng.next() % vocab as u64) as i64
            };
        }
        if p % 7 == 3 {
            mask[w[0] as usize] = 0;
        }
    }
    if with_faults {
        b[101 * vocab + 7] = f32::NAN;
        b[702 * vocab + 3] = f32::NEG_INFINITY;
    }
    let paths = (
        dir.path("ref.safetensors"),
        dir.path("cand-a.safetensors"),
        dir.path("cand-b.safetensors"),
    );
    write_logits(
        &paths.0,
        Dtype::F32,
        &r,
        rows,
        vocab,
        &targets,
        &mask,
        &offsets,
        "Wren-7",
    );
    write_logits(
        &paths.1,
        Dtype::F32,
        &a,
        rows,
        vocab,
        &targets,
        &mask,
        &offsets,
        "Wren-7 light (invented)",
    );
    write_logits(
        &paths.2,
        Dtype::BF16,
        &b,
        rows,
        vocab,
        &targets,
        &mask,
        &offsets,
        "Wren-7 int3 (invented)",
    );
    paths
}

fn run(args: &[&str]) -> Output {
    Command::new(BIN).args(args).output().expect("run klgauge")
}

fn code(o: &Output) -> i32 {
    o.status.code().expect("exit code")
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn read_json(p: &Path) -> Value {
    serde_json::from_slice(&std::fs::read(p).unwrap()).unwrap()
}

fn rel(a: f64, b: f64) -> f64 {
    if a == b {
        0.0
    } else {
        ((a - b) / b).abs()
    }
}

/// Both null (a non-finite value) or both numbers within `tol` relative.
fn close(what: &str, a: &Value, b: &Value, tol: f64) -> f64 {
    match (a.as_f64(), b.as_f64()) {
        (Some(x), Some(y)) => {
            let r = rel(x, y);
            assert!(
                r <= tol,
                "{what}: merged {x:e}, single {y:e}, relative difference {r:e} > {tol:e}"
            );
            r
        }
        _ => {
            assert_eq!(a, b, "{what}");
            0.0
        }
    }
}

const MEAN_TOL: f64 = 1e-12;
const SKETCH_TOL: f64 = 0.01;

/// Compares a merged report with the single run's; returns the worst
/// relative percentile difference seen.
fn compare_reports(merged: &Value, single: &Value) -> f64 {
    assert_eq!(merged["schema"], single["schema"]);
    assert_eq!(merged["units"], single["units"]);
    assert_eq!(merged["reference"], single["reference"]);
    for k in ["compared_vocab", "samples", "seed", "top", "js"] {
        assert_eq!(merged["settings"][k], single["settings"][k], "settings.{k}");
    }
    assert_eq!(single["settings"]["percentiles"], "exact");
    assert!(merged["settings"]["percentiles"]
        .as_str()
        .unwrap()
        .starts_with("sketch"));
    let (mc, sc) = (
        merged["candidates"].as_array().unwrap(),
        single["candidates"].as_array().unwrap(),
    );
    assert_eq!(mc.len(), sc.len());
    let mut worst_pct = 0f64;
    for (m, s) in mc.iter().zip(sc) {
        let path = s["path"].as_str().unwrap();
        for k in [
            "path",
            "dtype",
            "model",
            "positions",
            "skipped_rows",
            "skipped",
            "infinite_kl",
            "warnings",
            "worst_positions",
            "worst_prompts",
            "sampling_cost",
        ] {
            if k == "sampling_cost" {
                assert_eq!(
                    m[k]["full_logit_bytes_per_position"],
                    s[k]["full_logit_bytes_per_position"]
                );
                continue;
            }
            assert_eq!(m[k], s[k], "{path}: {k}");
        }
        for k in [
            "top1_agree",
            "ppl_ref",
            "ppl_cand",
            "ppl_ratio",
            "storage_floor",
        ] {
            close(&format!("{path}: {k}"), &m[k], &s[k], MEAN_TOL);
        }
        for metric in [
            "kl",
            "kl_reverse",
            "tv",
            "entropy_ref",
            "entropy_cand",
            "nll_ref",
            "nll_cand",
            "js",
        ] {
            let (ma, sa) = (&m[metric], &s[metric]);
            if sa.is_null() {
                assert!(ma.is_null(), "{path}: {metric}");
                continue;
            }
            assert_eq!(ma["n"], sa["n"], "{path}: {metric}.n");
            assert_eq!(ma["max"], sa["max"], "{path}: {metric}.max");
            close(
                &format!("{path}: {metric}.mean"),
                &ma["mean"],
                &sa["mean"],
                MEAN_TOL,
            );
            match (ma["ci95"].as_array(), sa["ci95"].as_array()) {
                (Some(x), Some(y)) => {
                    close(&format!("{path}: {metric}.ci95"), &x[0], &y[0], MEAN_TOL);
                    close(&format!("{path}: {metric}.ci95"), &x[1], &y[1], MEAN_TOL);
                }
                _ => assert_eq!(ma["ci95"], sa["ci95"], "{path}: {metric}.ci95"),
            }
            for p in ["p50", "p90", "p99", "p999"] {
                let r = close(&format!("{path}: {metric}.{p}"), &ma[p], &sa[p], SKETCH_TOL);
                worst_pct = worst_pct.max(r);
            }
        }
        let (me, se) = (
            m["estimators"].as_array().unwrap(),
            s["estimators"].as_array().unwrap(),
        );
        assert_eq!(me.len(), se.len());
        for (x, y) in me.iter().zip(se) {
            assert_eq!(x["direction"], y["direction"]);
            assert_eq!(x["samples_per_position"], y["samples_per_position"]);
            assert_eq!(x["positions"], y["positions"]);
            close(
                "estimator exact_mean",
                &x["exact_mean"],
                &y["exact_mean"],
                MEAN_TOL,
            );
            for k in ["k1", "k2", "k3"] {
                close(&format!("{k}.mean"), &x[k]["mean"], &y[k]["mean"], MEAN_TOL);
                // Sums of squares merged in another order: the variance formula
                // subtracts nearby numbers, so allow a little more.
                for f in ["bias", "std", "rmse"] {
                    close(&format!("{k}.{f}"), &x[k][f], &y[k][f], 1e-9);
                }
                close(
                    &format!("{k}.positions_for_10pct"),
                    &x[k]["positions_for_10pct"],
                    &y[k]["positions_for_10pct"],
                    1e-3,
                );
            }
        }
        let (mg, sg) = (
            m["gates"].as_array().unwrap(),
            s["gates"].as_array().unwrap(),
        );
        assert_eq!(mg.len(), sg.len());
        for (x, y) in mg.iter().zip(sg) {
            for k in ["name", "limit", "pass", "uncertain"] {
                assert_eq!(x[k], y[k], "{path}: gate {}", y["name"]);
            }
            let tol = if y["name"] == "max-kl-p99" {
                SKETCH_TOL
            } else {
                MEAN_TOL
            };
            close("gate value", &x["value"], &y["value"], tol);
        }
    }
    let (mp, sp) = (
        merged["comparisons"].as_array().unwrap(),
        single["comparisons"].as_array().unwrap(),
    );
    assert_eq!(mp.len(), sp.len());
    for (x, y) in mp.iter().zip(sp) {
        for k in ["a", "b", "positions", "verdict"] {
            assert_eq!(x[k], y[k]);
        }
        close(
            "paired kl_mean_diff",
            &x["kl_mean_diff"],
            &y["kl_mean_diff"],
            MEAN_TOL,
        );
    }
    worst_pct
}

/// The terminal summary: the same lines with the same labels.
fn same_layout(merged: &str, single: &str) {
    let (m, s): (Vec<&str>, Vec<&str>) = (merged.lines().collect(), single.lines().collect());
    assert_eq!(m.len(), s.len(), "merged:\n{merged}\nsingle:\n{single}");
    for (x, y) in m.iter().zip(&s) {
        let label = |l: &str| {
            l.chars()
                .take_while(|c| !c.is_ascii_digit())
                .collect::<String>()
        };
        assert_eq!(label(x), label(y), "merged line `{x}` vs single `{y}`");
    }
}

/// Runs the single pass and the three-shard pass with the same options and
/// compares them; returns the worst percentile difference.
fn single_vs_sharded(
    dir: &Scratch,
    inputs: &[&Path],
    opts: &[&str],
    merge_opts: &[&str],
    gates: &[&str],
    expect_code: i32,
) -> f64 {
    let single_json = dir.path("single.json");
    let mut args: Vec<&str> = vec!["compare"];
    args.extend(inputs.iter().map(|p| s(p)));
    args.extend(opts);
    args.extend(gates);
    args.extend(["--json", s(&single_json)]);
    let single = run(&args);
    assert_eq!(
        code(&single),
        expect_code,
        "single run: {}",
        String::from_utf8_lossy(&single.stderr)
    );

    let n = 3;
    let mut partials = Vec::new();
    for i in 0..n {
        let part = dir.path(&format!("part-{i}.json"));
        let shard = format!("{i}/{n}");
        let mut args: Vec<&str> = vec!["compare"];
        args.extend(inputs.iter().map(|p| s(p)));
        args.extend(opts);
        args.extend(["--shard", &shard, "--partial", s(&part)]);
        let o = run(&args);
        assert_eq!(
            code(&o),
            0,
            "shard {shard}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
        assert!(String::from_utf8_lossy(&o.stdout).contains(&format!("shard {shard}")));
        partials.push(part);
    }
    let merged_json = dir.path("merged.json");
    // Shards given out of order: merge sorts them.
    let mut args: Vec<&str> = vec!["merge", s(&partials[2]), s(&partials[0]), s(&partials[1])];
    args.extend(gates);
    args.extend(merge_opts);
    args.extend(["--json", s(&merged_json)]);
    let merged = run(&args);
    assert_eq!(
        code(&merged),
        expect_code,
        "merge: {}",
        String::from_utf8_lossy(&merged.stderr)
    );
    same_layout(
        &String::from_utf8_lossy(&merged.stdout),
        &String::from_utf8_lossy(&single.stdout),
    );
    compare_reports(&read_json(&merged_json), &read_json(&single_json))
}

#[test]
fn three_shards_merge_to_the_single_run() {
    let dir = Scratch::new("equal");
    let (r, a, b) = make_inputs(&dir, 7, true);
    // Candidate b has an infinite kl, so the mean gate fails: exit 1 in both.
    let gates = [
        "--max-kl-mean",
        "0.5",
        "--max-kl-p99",
        "2.0",
        "--min-top1",
        "0.5",
    ];
    let tok = write_tokenizer(&dir, 200);
    let opts = ["--js", "--samples", "1,4", "--tokenizer", s(&tok)];
    let w = single_vs_sharded(
        &dir,
        &[&r, &a, &b],
        &opts,
        &["--tokenizer", s(&tok)],
        &gates,
        1,
    );
    eprintln!("worst relative percentile difference, merged vs single (with faults): {w:.3e}");
    let single = read_json(&dir.path("single.json"));
    assert_eq!(single["candidates"][1]["infinite_kl"], 1);
    assert_eq!(single["candidates"][1]["skipped_rows"], 1);
    // Token text comes from the tokenizer at merge time and matches the single run's.
    let w0 = &read_json(&dir.path("merged.json"))["candidates"][0]["worst_positions"][0];
    assert!(
        w0["ref_top"][0]["text"]
            .as_str()
            .unwrap()
            .starts_with("tok"),
        "{w0}"
    );
}

/// An invented tokenizer.json with tokens "tok0" .. "tokN-1".
fn write_tokenizer(dir: &Scratch, n: usize) -> PathBuf {
    let vocab: serde_json::Map<String, Value> = (0..n)
        .map(|i| (format!("tok{i}"), Value::from(i)))
        .collect();
    let p = dir.path("tokenizer.json");
    std::fs::write(
        &p,
        serde_json::to_vec(&serde_json::json!({ "model": { "vocab": vocab } })).unwrap(),
    )
    .unwrap();
    p
}

#[test]
fn passing_gates_pass_after_merging_too() {
    let dir = Scratch::new("pass");
    let (r, a, _) = make_inputs(&dir, 11, false);
    let gates = [
        "--max-kl-mean",
        "0.01",
        "--max-kl-p99",
        "0.05",
        "--min-top1",
        "0.5",
    ];
    let w = single_vs_sharded(
        &dir,
        &[&r, &a],
        &["--top", "7", "--bits"],
        &["--bits"],
        &gates,
        0,
    );
    eprintln!(
        "worst relative percentile difference, merged vs single (light candidate, bits): {w:.3e}"
    );
    let merged = read_json(&dir.path("merged.json"));
    assert_eq!(merged["units"], "bits");
    assert_eq!(
        merged["candidates"][0]["worst_positions"]
            .as_array()
            .unwrap()
            .len(),
        7
    );

    // A p99 limit within the sketch's accuracy of the merged value is flagged.
    let p99 = merged["candidates"][0]["kl"]["p99"].as_f64().unwrap();
    let limit = format!("{}", p99 * 1.001);
    let near = dir.path("near.json");
    let parts: Vec<PathBuf> = (0..3)
        .map(|i| dir.path(&format!("part-{i}.json")))
        .collect();
    let o = run(&[
        "merge",
        s(&parts[0]),
        s(&parts[1]),
        s(&parts[2]),
        "--bits",
        "--max-kl-p99",
        &limit,
        "--json",
        s(&near),
    ]);
    assert_eq!(code(&o), 0);
    let warned = read_json(&near)["candidates"][0]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|w| w.as_str().unwrap().contains("within the sketch's accuracy"));
    assert!(warned, "{}", String::from_utf8_lossy(&o.stdout));
}

fn shard_partials(dir: &Scratch, inputs: &[&Path], tag: &str, extra: &[&str]) -> Vec<PathBuf> {
    (0..3)
        .map(|i| {
            let part = dir.path(&format!("{tag}-{i}.json"));
            let shard = format!("{i}/3");
            let mut args: Vec<&str> = vec!["compare"];
            args.extend(inputs.iter().map(|p| s(p)));
            args.extend(extra);
            args.extend(["--samples", "2", "--shard", &shard, "--partial", s(&part)]);
            let o = run(&args);
            assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
            part
        })
        .collect()
}

fn refused(args: &[&str], names: &[&str], says: &str) {
    let o = run(args);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(code(&o), 2, "expected exit 2 for {args:?}; stderr: {err}");
    for n in names {
        assert!(err.contains(n), "stderr should name {n}: {err}");
    }
    assert!(err.contains(says), "stderr should say `{says}`: {err}");
    assert_eq!(err.lines().count(), 1, "one clear message: {err}");
    assert!(!err.contains("panicked"));
}

#[test]
fn merge_refuses_duplicate_missing_and_foreign_shards() {
    let dir = Scratch::new("refuse");
    let (r, a, _) = make_inputs(&dir, 3, false);
    let p = shard_partials(&dir, &[&r, &a], "run", &[]);
    let out = dir.path("never.json");
    let (p0, p1, p2) = (s(&p[0]), s(&p[1]), s(&p[2]));

    refused(
        &["merge", p0, p1, p1, p2, "--json", s(&out)],
        &[p1],
        "already holds",
    );
    refused(
        &["merge", p0, p2, "--json", s(&out)],
        &["1/3", p0, p2],
        "missing",
    );

    // The same run layout over other logits (another seed): a different input.
    let other = Scratch::new("refuse-other");
    let (r2, a2, _) = make_inputs(&other, 4, false);
    let q = shard_partials(&other, &[&r2, &a2], "other", &[]);
    refused(
        &["merge", p0, s(&q[1]), p2, "--json", s(&out)],
        &[s(&q[1])],
        "different run",
    );

    // Same inputs, other settings: refused as well.
    let seeded = shard_partials(&dir, &[&r, &a], "seeded", &["--seed", "9"]);
    refused(
        &["merge", p0, s(&seeded[1]), p2],
        &[s(&seeded[1])],
        "settings",
    );

    // Not a partial result at all, and a JSON report given by mistake.
    let junk = dir.path("junk.json");
    std::fs::write(&junk, b"{\"schema\": \"klgauge-report/1\"}").unwrap();
    refused(
        &["merge", p0, s(&junk), p2],
        &[s(&junk)],
        "not a klgauge partial result",
    );
    let cut = dir.path("cut.json");
    let text = std::fs::read(&p[1]).unwrap();
    std::fs::write(&cut, &text[..text.len() / 2]).unwrap();
    refused(
        &["merge", p0, s(&cut), p2],
        &[s(&cut)],
        "not a klgauge partial result",
    );

    // No report was left behind by any refusal.
    assert!(!out.exists());

    // --html with --json: either both are written or, where this build has
    // no HTML format, a usage error and neither.
    let (html, json) = (dir.path("r.html"), dir.path("r.json"));
    let o = run(&["merge", p0, p1, p2, "--html", s(&html), "--json", s(&json)]);
    match code(&o) {
        0 => assert!(html.exists() && json.exists()),
        2 => assert!(
            !html.exists() && !json.exists(),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        ),
        c => panic!("exit {c}: {}", String::from_utf8_lossy(&o.stderr)),
    }

    // The complete set still merges.
    let ok = run(&["merge", p2, p1, p0]);
    assert_eq!(code(&ok), 0, "{}", String::from_utf8_lossy(&ok.stderr));
}

#[test]
fn shard_options_are_checked() {
    let dir = Scratch::new("usage");
    let (r, a, _) = make_inputs(&dir, 5, false);
    let part = dir.path("p.json");
    let (r, a, part) = (s(&r), s(&a), s(&part));
    refused(
        &["compare", r, a, "--shard", "0/2"],
        &["--partial"],
        "--shard needs --partial",
    );
    refused(
        &["compare", r, a, "--shard", "2/2", "--partial", part],
        &["2/2"],
        "expected I/N",
    );
    refused(
        &[
            "compare",
            r,
            a,
            "--shard",
            "0/2",
            "--partial",
            part,
            "--max-kl-mean",
            "1",
        ],
        &["merge"],
        "gates",
    );
    refused(
        &[
            "compare",
            r,
            a,
            "--shard",
            "0/2",
            "--partial",
            part,
            "--json",
            "x.json",
        ],
        &["merge"],
        "partial result",
    );
    assert!(!Path::new(part).exists());
    // More shards than prompts: the empty shards are valid and merge cleanly.
    let many: Vec<PathBuf> = (0..50)
        .map(|i| {
            let p = dir.path(&format!("m{i}.json"));
            let shard = format!("{i}/50");
            let o = run(&[
                "compare",
                r,
                a,
                "--samples",
                "0",
                "--shard",
                &shard,
                "--partial",
                s(&p),
            ]);
            assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
            p
        })
        .collect();
    let mut args = vec!["merge"];
    args.extend(many.iter().map(|p| s(p)));
    let o = run(&args);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    args.extend(["--top", "50"]);
    refused(&args, &["--top 50"], "kept only");

    // --partial without --shard: the whole input as shard 0/1.
    let whole = dir.path("whole.json");
    let o = run(&["compare", r, a, "--partial", s(&whole)]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stdout).contains("shard 0/1"));
    let o = run(&["merge", s(&whole)]);
    assert_eq!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
}

/// A larger run for measuring the sketch on realistic per-position values:
/// `cargo test --test shard_merge -- --ignored --nocapture`.
#[test]
#[ignore]
fn measure_percentile_accuracy_on_a_larger_run() {
    let dir = Scratch::new("measure");
    let (r, a, b) = make_inputs_sized(&dir, 21, false, 1200, 256);
    let w = single_vs_sharded(
        &dir,
        &[&r, &a, &b],
        &["--samples", "0", "--js"],
        &[],
        &[],
        0,
    );
    let (m, s) = (
        read_json(&dir.path("merged.json")),
        read_json(&dir.path("single.json")),
    );
    let (mut sum, mut n) = (0f64, 0usize);
    for (x, y) in m["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .zip(s["candidates"].as_array().unwrap())
    {
        for metric in [
            "kl",
            "kl_reverse",
            "tv",
            "js",
            "entropy_ref",
            "entropy_cand",
            "nll_ref",
            "nll_cand",
        ] {
            for p in ["p50", "p90", "p99", "p999"] {
                let (u, v) = (
                    x[metric][p].as_f64().unwrap(),
                    y[metric][p].as_f64().unwrap(),
                );
                sum += rel(u, v);
                n += 1;
            }
        }
    }
    eprintln!(
        "positions {}, percentiles compared {n}: mean relative difference {:.3e}, worst {w:.3e}",
        s["candidates"][0]["positions"],
        sum / n as f64
    );
}
