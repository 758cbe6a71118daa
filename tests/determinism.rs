//! Determinism: the same inputs and seed give byte-identical reports whatever
//! the thread count, run after run, and however the rows are split into
//! shards. Only the timing fields (`timing` and
//! `candidates[].sampling_cost.exact_pass_seconds`) may differ.
//!
//! The input spans two engine blocks (256 rows each, and many more at the
//! block sizes one test asks for) with a ragged last block, three
//! candidates in three dtypes, uneven prompts, masked rows, rows without a
//! target, rows with NaN (skipped) and an infinite kl, so every
//! reduction path (per-prompt sums, percentiles, worst lists, estimators,
//! skipped lists, paired comparisons) is exercised.

mod common;

use common::*;
use safetensors::tensor::Dtype;
use std::path::{Path, PathBuf};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

const ROWS: usize = 64 * 7 + 37;
const VOCAB: usize = 700;

struct Inputs {
    dir: tempdir::Dir,
    reference: PathBuf,
    candidates: Vec<PathBuf>,
    x: Vec<f32>,
    targets: Vec<i64>,
    offsets: Vec<i64>,
    mask: Vec<u8>,
}

fn inputs() -> Inputs {
    let dir = tempdir::Dir::new();
    let mut r = Rng(2024);
    let x: Vec<f32> = (0..ROWS * VOCAB)
        .map(|_| (2.5 * r.normal()) as f32)
        .collect();
    let targets: Vec<i64> = (0..ROWS)
        .map(|i| {
            if i % 17 == 5 {
                -1
            } else {
                (r.uniform() * VOCAB as f64) as i64
            }
        })
        .collect();
    // Uneven prompts: lengths cycle through 1..=40.
    let mut offsets = vec![0i64];
    let mut len = 1;
    while (*offsets.last().unwrap() as usize) < ROWS {
        let next = (*offsets.last().unwrap() as usize + len).min(ROWS);
        offsets.push(next as i64);
        len = len % 40 + 1;
    }
    let mask: Vec<u8> = (0..ROWS).map(|i| (i % 23 != 11) as u8).collect();
    let reference = dir.path().join("ref.safetensors");
    write(
        &reference,
        vec![
            ("logits", floats(Dtype::F32, &[ROWS, VOCAB], &x)),
            ("targets", i64s(&[ROWS], &targets)),
            ("prompt_offsets", i64s(&[offsets.len()], &offsets)),
            ("mask", u8s(&[ROWS], &mask)),
        ],
        None,
    );
    let mut candidates = Vec::new();
    for (k, (dtype, noise)) in [(Dtype::F32, 0.05), (Dtype::BF16, 0.2), (Dtype::F16, 0.6)]
        .into_iter()
        .enumerate()
    {
        let mut y: Vec<f32> = x
            .iter()
            .map(|&v| (v as f64 + noise * r.normal()) as f32)
            .collect();
        if k == 2 {
            // Value faults: two NaN rows and one zero-probability token.
            y[3 * VOCAB + 10] = f32::NAN;
            y[200 * VOCAB + 699] = f32::NAN;
            y[130 * VOCAB + 7] = f32::NEG_INFINITY;
        }
        let p = dir.path().join(format!("cand{k}.safetensors"));
        write(
            &p,
            vec![
                ("logits", floats(dtype, &[ROWS, VOCAB], &y)),
                ("targets", i64s(&[ROWS], &targets)),
            ],
            None,
        );
        candidates.push(p);
    }
    Inputs {
        dir,
        reference,
        candidates,
        x,
        targets,
        offsets,
        mask,
    }
}

/// Sets the value of every timing field to 0, leaving every other byte alone.
fn mask_timing(json: &str) -> String {
    json.lines()
        .map(|l| {
            let t = l.trim_start();
            if t.starts_with("\"exact_pass_seconds\":") || t.starts_with("\"rows_per_second\":") {
                let key_end = l.find(':').unwrap();
                let comma = if l.trim_end().ends_with(',') { "," } else { "" };
                format!("{} 0{comma}", &l[..=key_end])
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// The text report without its timing line.
fn mask_text(text: &[u8]) -> String {
    String::from_utf8_lossy(text)
        .lines()
        .filter(|l| !l.starts_with("exact pass:"))
        .collect::<Vec<_>>()
        .join("\n")
}

struct Run {
    json: String,
    csv: Vec<u8>,
    text: String,
}

/// One run with `env` added to the environment; the reports it wrote, read back.
fn run(
    inp: &Inputs,
    reference: &Path,
    candidates: &[PathBuf],
    threads: usize,
    seed: u64,
    tag: &str,
    env: &[(&str, &str)],
) -> Run {
    let (j, c) = (
        inp.dir.path().join(format!("{tag}.json")),
        inp.dir.path().join(format!("{tag}.csv")),
    );
    let mut args: Vec<String> = vec!["compare".into(), s(reference).into()];
    args.extend(candidates.iter().map(|p| s(p).to_string()));
    let seed = seed.to_string();
    let threads = threads.to_string();
    args.extend(
        [
            "--json",
            s(&j),
            "--csv",
            s(&c),
            "--js",
            "--samples",
            "1,4,16",
            "--seed",
            &seed,
            "--threads",
            &threads,
            "--top",
            "12",
        ]
        .map(String::from),
    );
    let argv: Vec<&str> = args.iter().map(|a| a.as_str()).collect();
    let out = klgauge_env(&argv, env);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    Run {
        json: mask_timing(&std::fs::read_to_string(&j).unwrap()),
        csv: std::fs::read(&c).unwrap(),
        text: mask_text(&out.stdout),
    }
}

/// Each candidate's per-position values are the same bits whether it is
/// compared alone or beside others: a candidate's total variation may be
/// summed inside another candidate's pass or the next row's (see
/// `kernel::TvFold`), which must not change it.
#[test]
fn a_candidate_alone_gives_the_bits_it_gives_among_others() {
    let inp = inputs();
    let all = run(&inp, &inp.reference, &inp.candidates, 2, 7, "all", &[]);
    let all = String::from_utf8(all.csv).unwrap();
    for (k, c) in inp.candidates.iter().enumerate() {
        let alone = run(
            &inp,
            &inp.reference,
            std::slice::from_ref(c),
            2,
            7,
            "alone",
            &[],
        );
        let alone = String::from_utf8(alone.csv).unwrap();
        let mine: Vec<&str> = all
            .lines()
            .skip(1)
            .filter_map(|l| l.strip_prefix(&format!("{k},")))
            .collect();
        let want: Vec<&str> = alone.lines().skip(1).collect();
        assert!(want.len() > 400, "candidate {k}: {} rows", want.len());
        assert_eq!(mine, want, "candidate {k}");
    }
}

#[test]
fn one_two_and_sixteen_threads_give_byte_identical_reports() {
    let inp = inputs();
    let a = run(&inp, &inp.reference, &inp.candidates, 1, 7, "t1", &[]);
    let b = run(&inp, &inp.reference, &inp.candidates, 2, 7, "t2", &[]);
    let c = run(&inp, &inp.reference, &inp.candidates, 2, 7, "t2-again", &[]);
    // More workers than cores: every task is stolen somewhere else.
    let d = run(&inp, &inp.reference, &inp.candidates, 16, 7, "t16", &[]);
    // The input did exercise what it was built for.
    let v: serde_json::Value = serde_json::from_str(&a.json).unwrap();
    assert_eq!(v["candidates"].as_array().unwrap().len(), 3);
    assert_eq!(v["candidates"][2]["skipped_rows"], 2);
    assert_eq!(v["candidates"][2]["infinite_kl"], 1);
    assert!(v["reference"]["prompts"].as_u64().unwrap() > 20);
    assert!(v["timing"]["exact_pass_seconds"].is_number());
    assert_eq!(a.json, b.json, "JSON differs between 1 and 2 threads");
    assert_eq!(b.json, c.json, "JSON differs between two identical runs");
    assert_eq!(a.json, d.json, "JSON differs between 1 and 16 threads");
    assert!(
        a.csv == b.csv && b.csv == c.csv && c.csv == d.csv,
        "CSV differs"
    );
    assert_eq!(a.text, b.text, "terminal report differs");
    assert_eq!(a.text, d.text, "terminal report differs at 16 threads");
    assert!(a.csv.len() > 3 * 400 * 50, "CSV unexpectedly short");
}

/// Asserts that two runs wrote the same JSON, CSV and terminal report;
/// `what` names the second run's difference from the first.
fn assert_same_report(base: &Run, r: &Run, what: &str) {
    assert_eq!(base.json, r.json, "JSON differs {what}");
    assert!(base.csv == r.csv, "CSV differs {what}");
    assert_eq!(base.text, r.text, "terminal report differs {what}");
}

/// Runs the inputs (two threads, seed 7) once without the environment
/// variable `var` and once with each of `values`, and asserts the same
/// JSON, CSV and terminal report every time.
fn same_report_whatever(var: &str, values: &[&str]) {
    let inp = inputs();
    let tag = var.to_lowercase();
    let base = run(
        &inp,
        &inp.reference,
        &inp.candidates,
        2,
        7,
        &format!("{tag}-unset"),
        &[],
    );
    for v in values {
        let r = run(
            &inp,
            &inp.reference,
            &inp.candidates,
            2,
            7,
            &format!("{tag}-{v}"),
            &[(var, v)],
        );
        assert_same_report(&base, &r, &format!("with {var}={v}"));
    }
}

#[test]
fn rows_read_from_the_map_or_by_positioned_reads_give_the_same_report() {
    // How rows are read (chosen per file by measuring page faults, see
    // LogitFile::stored_row) only changes where the bytes come from.
    same_report_whatever("KLGAUGE_IO", &["map", "read"]);
}

#[test]
fn the_block_size_does_not_change_the_report() {
    // Where the files cannot stay in the page cache, a run takes fewer rows
    // per block (see `engine::block_rows`); a block's end settles the total
    // variations its rows left to later passes, which must not change them.
    same_report_whatever("KLGAUGE_BLOCK_ROWS", &["1", "5", "16", "64"]);
}

#[test]
fn dropping_rows_behind_the_pass_does_not_change_the_report() {
    // Where the files cannot stay in the page cache, finished rows are
    // dropped from it, blocks are smaller, and the worst positions' top
    // tokens are taken during the pass instead of read again after it.
    same_report_whatever("KLGAUGE_DROP_BEHIND", &["always", "never"]);
    // There the workers claim rows in row order: any number of them gives
    // the same report.
    let inp = inputs();
    let always = [("KLGAUGE_DROP_BEHIND", "always")];
    let runs: Vec<Run> = [1, 2, 16]
        .iter()
        .map(|&t| {
            let tag = format!("drop-behind-{t}");
            run(&inp, &inp.reference, &inp.candidates, t, 7, &tag, &always)
        })
        .collect();
    for (r, t) in runs[1..].iter().zip([2, 16]) {
        assert_same_report(&runs[0], r, &format!("at {t} threads"));
    }
}

#[test]
fn the_seed_moves_only_the_estimators() {
    let inp = inputs();
    let a = run(&inp, &inp.reference, &inp.candidates[..1], 2, 1, "s1", &[]);
    let b = run(&inp, &inp.reference, &inp.candidates[..1], 2, 2, "s2", &[]);
    let (mut va, mut vb): (serde_json::Value, serde_json::Value) = (
        serde_json::from_str(&a.json).unwrap(),
        serde_json::from_str(&b.json).unwrap(),
    );
    assert_eq!(
        a.csv, b.csv,
        "per-position metrics do not depend on the seed"
    );
    assert_ne!(
        va["candidates"][0]["estimators"],
        vb["candidates"][0]["estimators"]
    );
    for v in [&mut va, &mut vb] {
        v["candidates"][0]
            .as_object_mut()
            .unwrap()
            .remove("estimators");
        v["settings"].as_object_mut().unwrap().remove("seed");
    }
    assert_eq!(va, vb);
}

#[test]
fn shards_in_a_directory_give_the_same_report() {
    let inp = inputs();
    // The reference cut into three shards at prompt boundaries, with local offsets.
    let dir = inp.dir.path().join("ref-shards");
    std::fs::create_dir_all(&dir).unwrap();
    let cuts = [
        0usize,
        inp.offsets.len() / 3,
        2 * inp.offsets.len() / 3,
        inp.offsets.len() - 1,
    ];
    for w in 0..3 {
        let (p0, p1) = (cuts[w], cuts[w + 1]);
        let (r0, r1) = (inp.offsets[p0] as usize, inp.offsets[p1] as usize);
        let local: Vec<i64> = inp.offsets[p0..=p1]
            .iter()
            .map(|&o| o - r0 as i64)
            .collect();
        write(
            &dir.join(format!("part-{w:03}.safetensors")),
            vec![
                (
                    "logits",
                    floats(
                        Dtype::F32,
                        &[r1 - r0, VOCAB],
                        &inp.x[r0 * VOCAB..r1 * VOCAB],
                    ),
                ),
                ("targets", i64s(&[r1 - r0], &inp.targets[r0..r1])),
                ("prompt_offsets", i64s(&[local.len()], &local)),
                ("mask", u8s(&[r1 - r0], &inp.mask[r0..r1])),
            ],
            None,
        );
    }
    let a = run(&inp, &inp.reference, &inp.candidates, 2, 3, "whole", &[]);
    let b = run(&inp, &dir, &inp.candidates, 1, 3, "sharded", &[]);
    assert_eq!(a.csv, b.csv);
    let (whole, sharded) = (s(&inp.reference), s(&dir));
    assert_eq!(
        a.json.replace(&format!("\"{whole}\""), "\"REF\""),
        b.json.replace(&format!("\"{sharded}\""), "\"REF\"")
    );
}
