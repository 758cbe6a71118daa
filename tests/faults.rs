//! Bad input and faults: every broken input is refused with exit code 2 and
//! one short message naming the file, never a panic or a hang, and leaves no
//! report behind; value faults inside rows are counted, not fatal; report
//! writing survives full disks, closed pipes and interrupts.
//!
//! Every broken file is made here by code: either with the `safetensors`
//! crate or by assembling the format's bytes (8-byte little-endian header
//! length, JSON header, tensor data) by hand.

mod common;

use common::*;
use safetensors::tensor::Dtype;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Bytes of a safetensors file with the given header text and data section.
fn raw(header: &str, data: &[u8]) -> Vec<u8> {
    let mut v = (header.len() as u64).to_le_bytes().to_vec();
    v.extend_from_slice(header.as_bytes());
    v.extend_from_slice(data);
    v
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn i32s(shape: &[usize], v: &[i32]) -> T {
    T {
        dtype: Dtype::I32,
        shape: shape.to_vec(),
        data: v.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}

fn bools(shape: &[usize], v: &[u8]) -> T {
    T {
        dtype: Dtype::BOOL,
        shape: shape.to_vec(),
        data: v.to_vec(),
    }
}

/// `rows x vocab` F32 logits, deterministic.
fn logits(rows: usize, vocab: usize, seed: u64) -> Vec<f32> {
    let mut r = Rng(seed);
    (0..rows * vocab)
        .map(|_| (2.0 * r.normal()) as f32)
        .collect()
}

fn lg(rows: usize, vocab: usize, seed: u64) -> T {
    floats(Dtype::F32, &[rows, vocab], &logits(rows, vocab, seed))
}

/// Names in a directory, sorted.
fn listing(d: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(d)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

/// Runs the binary with a time limit: a hang is a failure, not a stuck test.
fn run_limited(args: &[&str], limit: Duration) -> Output {
    let mut child = Command::new(env!("CARGO_BIN_EXE_klgauge"))
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start klgauge");
    let start = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            return child.wait_with_output().unwrap();
        }
        if start.elapsed() > limit {
            let _ = child.kill();
            let _ = child.wait();
            panic!("klgauge {args:?} still running after {limit:?}: it hangs");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// One broken-input case: where the broken file is and what the message must say.
struct Case {
    name: &'static str,
    /// The path the message must name.
    culprit: PathBuf,
    args: Vec<String>,
    /// Words the message must contain (lower-case comparison).
    says: &'static str,
}

/// Asserts SPEC's contract for bad input on one case.
fn check(dir: &Path, c: &Case) {
    let before = listing(dir);
    let json = dir.join("out.json");
    let csv = dir.join("out.csv");
    let mut args: Vec<&str> = c.args.iter().map(|a| a.as_str()).collect();
    args.extend(["--json", s(&json), "--csv", s(&csv)]);
    let out = run_limited(&args, Duration::from_secs(60));
    let err = String::from_utf8_lossy(&out.stderr);
    // Shown with --nocapture: the whole list of messages, for reading.
    println!("{:<36} {}", c.name, err.trim());
    assert_eq!(
        out.status.code(),
        Some(2),
        "[{}] exit code; stderr: {err}",
        c.name
    );
    assert!(!err.contains("panicked"), "[{}] panicked: {err}", c.name);
    let lines = err.lines().count();
    assert!(
        (1..=3).contains(&lines),
        "[{}] {lines} lines of stderr: {err}",
        c.name
    );
    assert!(
        err.contains(&c.culprit.display().to_string()),
        "[{}] message does not name {}: {err}",
        c.name,
        c.culprit.display()
    );
    assert!(
        err.to_lowercase().contains(c.says),
        "[{}] message lacks {:?}: {err}",
        c.name,
        c.says
    );
    assert_eq!(listing(dir), before, "[{}] files left behind", c.name);
    assert!(out.stdout.is_empty(), "[{}] printed a report", c.name);
}

/// A good reference or candidate: 6 rows x 8 columns with targets and offsets.
fn good(path: &Path, seed: u64) {
    write(
        path,
        vec![
            ("logits", lg(6, 8, seed)),
            ("targets", i64s(&[6], &[1, 2, 3, 4, 5, 6])),
            ("prompt_offsets", i64s(&[3], &[0, 2, 6])),
        ],
        None,
    );
}

/// Every broken-input case, written into `d`. The broken file is compared
/// against (or with) a good one, in the position where it matters.
fn cases(d: &Path) -> Vec<Case> {
    let good_ref = d.join("good-ref.safetensors");
    let good_cand = d.join("good-cand.safetensors");
    good(&good_ref, 1);
    good(&good_cand, 2);
    let mut v = Vec::new();
    // A broken candidate, compared with the good reference.
    let mut cand = |name: &'static str, says: &'static str, bytes: Vec<u8>| {
        let p = d.join(format!("{name}.safetensors"));
        std::fs::write(&p, bytes).unwrap();
        v.push(Case {
            name,
            culprit: p.clone(),
            args: vec!["compare".into(), s(&good_ref).into(), s(&p).into()],
            says,
        });
    };
    let good_bytes = std::fs::read(&good_cand).unwrap();
    let data = f32_bytes(&logits(4, 10, 3));

    cand("empty", "empty", Vec::new());
    cand(
        "five-bytes",
        "shorter than the 8-byte",
        b"\x01\x02\x03\x04\x05".to_vec(),
    );
    cand(
        "truncated",
        "truncated",
        good_bytes[..good_bytes.len() - 10].to_vec(),
    );
    cand("truncated-in-header", "exceeds", good_bytes[..40].to_vec());
    cand(
        "padded",
        "bytes after the end",
        [good_bytes.clone(), vec![0u8; 16]].concat(),
    );
    cand("header-longer-than-file", "header length", {
        let mut b = 1_000_000u64.to_le_bytes().to_vec();
        b.extend_from_slice(b"{}");
        b
    });
    cand(
        "header-length-huge",
        "header length",
        u64::MAX
            .to_le_bytes()
            .iter()
            .chain(b"{}")
            .copied()
            .collect(),
    );
    cand("header-length-zero", "header length 0", raw("", &data));
    cand(
        "header-not-json",
        "not json",
        raw("this is not json at all", &data),
    );
    cand(
        "header-json-array",
        "not an object",
        raw("[1, 2, 3]", &data),
    );
    cand("header-not-utf8", "utf-8", {
        let mut b = 6u64.to_le_bytes().to_vec();
        b.extend_from_slice(&[0x7b, 0xff, 0xfe, 0xfd, 0x7d, 0x20]);
        b
    });
    cand(
        "metadata-not-strings",
        "malformed entry",
        raw(
            r#"{"__metadata__":{"model":7},"logits":{"dtype":"F32","shape":[4,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "offsets-overlap",
        "overlaps",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[4,10],"data_offsets":[0,160]},"targets":{"dtype":"I64","shape":[4],"data_offsets":[128,160]}}"#,
            &data,
        ),
    );
    cand(
        "offsets-gap",
        "gap",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[4,9],"data_offsets":[16,160]}}"#,
            &data,
        ),
    );
    cand(
        "offsets-backwards",
        "backwards",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[0,10],"data_offsets":[160,0]}}"#,
            &data,
        ),
    );
    cand(
        "offsets-beyond-file",
        "truncated",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[8,10],"data_offsets":[0,320]}}"#,
            &data,
        ),
    );
    cand(
        "shape-disagrees-with-bytes",
        "needs 320 bytes",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[8,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "shape-overflows",
        "overflows",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[4294967296,4294967296,4294967296],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "shape-overflows-with-zero-vocab",
        "overflows",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[4611686018427387904,8,0],"data_offsets":[0,0]}}"#,
            b"",
        ),
    );
    cand(
        "unknown-dtype",
        "malformed entry (unknown variant `f12`",
        raw(
            r#"{"logits":{"dtype":"F12","shape":[4,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "negative-shape",
        "malformed entry",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[-4,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "no-tensors",
        "no `logits`",
        raw(r#"{"__metadata__":{"model":"Wren-7"}}"#, b""),
    );
    cand(
        "no-logits",
        "no `logits`",
        raw(
            r#"{"scores":{"dtype":"F32","shape":[4,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "logits-i32",
        "dtype i32",
        raw(
            r#"{"logits":{"dtype":"I32","shape":[4,10],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "logits-f64",
        "dtype f64",
        raw(
            r#"{"logits":{"dtype":"F64","shape":[4,5],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "logits-u8",
        "dtype u8",
        raw(
            r#"{"logits":{"dtype":"U8","shape":[4,40],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "rank-1",
        "rank 1",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[40],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "rank-4",
        "rank 4",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[2,2,2,5],"data_offsets":[0,160]}}"#,
            &data,
        ),
    );
    cand(
        "rank-0",
        "rank 0",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[],"data_offsets":[0,4]}}"#,
            &data[..4],
        ),
    );
    cand(
        "zero-rows",
        "0 rows",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[0,10],"data_offsets":[0,0]}}"#,
            b"",
        ),
    );
    cand(
        "zero-length-sequences",
        "0 rows",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[4,0,10],"data_offsets":[0,0]}}"#,
            b"",
        ),
    );
    cand(
        "zero-vocab",
        "vocabulary of 0",
        raw(
            r#"{"logits":{"dtype":"F32","shape":[6,0],"data_offsets":[0,0]}}"#,
            b"",
        ),
    );

    // Random bytes, seeded: as they come, and behind a plausible header length.
    let mut r = Rng(99);
    let noise: Vec<u8> = (0..4096).map(|_| (r.uniform() * 256.0) as u8).collect();
    cand("random-bytes", "safetensors", noise.clone());
    cand(
        "random-after-length",
        "header",
        [100u64.to_le_bytes().to_vec(), noise.clone()].concat(),
    );

    // Files that are valid safetensors but break the logit layout.
    let mut lay = |name: &'static str, says: &'static str, tensors: Vec<(&str, T)>| {
        let p = d.join(format!("{name}.safetensors"));
        write(&p, tensors, None);
        v.push(Case {
            name,
            culprit: p.clone(),
            args: vec!["compare".into(), s(&good_ref).into(), s(&p).into()],
            says,
        });
    };
    let offs = || i64s(&[3], &[0, 2, 6]);
    let tg = || i64s(&[6], &[1, 2, 3, 4, 5, 6]);
    lay(
        "vocab-mismatch",
        "vocabulary 9 differs",
        vec![
            ("logits", lg(6, 9, 4)),
            ("targets", tg()),
            ("prompt_offsets", offs()),
        ],
    );
    lay("row-mismatch", "has 7 rows", vec![("logits", lg(7, 8, 4))]);
    lay(
        "targets-differ",
        "`targets` differ",
        vec![
            ("logits", lg(6, 8, 4)),
            ("targets", i64s(&[6], &[1, 2, 3, 4, 0, 6])),
        ],
    );
    lay(
        "targets-wrong-length",
        "`targets` has shape [5]",
        vec![
            ("logits", lg(6, 8, 4)),
            ("targets", i64s(&[5], &[1, 2, 3, 4, 5])),
        ],
    );
    lay(
        "targets-2d-for-2d",
        "`targets` has shape [6, 1]",
        vec![
            ("logits", lg(6, 8, 4)),
            ("targets", i64s(&[6, 1], &[1, 2, 3, 4, 5, 6])),
        ],
    );
    lay(
        "targets-float",
        "expected i32 or i64",
        vec![
            ("logits", lg(6, 8, 4)),
            ("targets", floats(Dtype::F32, &[6], &[1.0; 6])),
        ],
    );
    lay(
        "targets-u8",
        "expected i32 or i64",
        vec![("logits", lg(6, 8, 4)), ("targets", u8s(&[6], &[1; 6]))],
    );
    lay(
        "offsets-not-monotone",
        "not strictly increasing",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[4], &[0, 4, 2, 6])),
        ],
    );
    lay(
        "offsets-repeat",
        "not strictly increasing",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[4], &[0, 2, 2, 6])),
        ],
    );
    lay(
        "offsets-negative",
        "not strictly increasing",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[4], &[0, -3, 2, 6])),
        ],
    );
    lay(
        "offsets-short-end",
        "ends at 5",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[3], &[0, 2, 5])),
        ],
    );
    lay(
        "offsets-long-end",
        "ends at 9",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[3], &[0, 2, 9])),
        ],
    );
    lay(
        "offsets-start",
        "starts at 1",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[3], &[1, 2, 6])),
        ],
    );
    lay(
        "offsets-one-entry",
        "at least one prompt",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[1], &[0])),
        ],
    );
    lay(
        "offsets-i32",
        "expected i64",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i32s(&[3], &[0, 2, 6])),
        ],
    );
    lay(
        "offsets-2d",
        "expected [prompts + 1]",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[1, 3], &[0, 2, 6])),
        ],
    );
    lay(
        "offsets-with-3d",
        "only allowed with a 2-d",
        vec![
            ("logits", floats(Dtype::F32, &[2, 3, 8], &logits(6, 8, 4))),
            ("prompt_offsets", offs()),
        ],
    );
    lay(
        "prompts-differ",
        "prompt boundaries differ",
        vec![
            ("logits", lg(6, 8, 4)),
            ("prompt_offsets", i64s(&[3], &[0, 3, 6])),
        ],
    );
    lay(
        "mask-wrong-shape",
        "`mask` has shape [5]",
        vec![("logits", lg(6, 8, 4)), ("mask", u8s(&[5], &[1; 5]))],
    );
    lay(
        "mask-3d-shape",
        "`mask` has shape [6]",
        vec![
            ("logits", floats(Dtype::F32, &[2, 3, 8], &logits(6, 8, 4))),
            ("mask", u8s(&[6], &[1; 6])),
        ],
    );
    lay(
        "mask-i32",
        "expected u8 or bool",
        vec![("logits", lg(6, 8, 4)), ("mask", i32s(&[6], &[1; 6]))],
    );
    lay(
        "mask-bool-not-0-or-1",
        "expected 0 or 1",
        vec![
            ("logits", lg(6, 8, 4)),
            ("mask", bools(&[6], &[1, 1, 2, 1, 0, 1])),
        ],
    );

    // Targets outside the vocabulary (the file compared with itself, so the
    // targets agree and only the range check can object).
    let p = d.join("targets-beyond-vocab.safetensors");
    write(
        &p,
        vec![
            ("logits", lg(6, 8, 5)),
            ("targets", i64s(&[6], &[1, 2, 8, 4, 5, 6])),
            ("prompt_offsets", offs()),
        ],
        None,
    );
    v.push(Case {
        name: "targets-beyond-vocab",
        culprit: p.clone(),
        args: vec!["compare".into(), s(&p).into(), s(&p).into()],
        says: "outside the vocabulary",
    });

    // Two candidates whose targets disagree, the reference having none.
    let (r0, c1, c2) = (
        d.join("no-targets-ref.safetensors"),
        d.join("targets-a.safetensors"),
        d.join("targets-b.safetensors"),
    );
    write(&r0, vec![("logits", lg(6, 8, 6))], None);
    write(&c1, vec![("logits", lg(6, 8, 7)), ("targets", tg())], None);
    write(
        &c2,
        vec![
            ("logits", lg(6, 8, 8)),
            ("targets", i64s(&[6], &[1, 2, 3, 4, 5, 0])),
        ],
        None,
    );
    v.push(Case {
        name: "targets-differ-between-candidates",
        culprit: c2.clone(),
        args: vec![
            "compare".into(),
            s(&r0).into(),
            s(&c1).into(),
            s(&c2).into(),
        ],
        says: "`targets` differ",
    });

    // A reference that is broken (the first file opened).
    let p = d.join("broken-reference.safetensors");
    std::fs::write(&p, &good_bytes[..good_bytes.len() - 1]).unwrap();
    v.push(Case {
        name: "broken-reference",
        culprit: p.clone(),
        args: vec!["compare".into(), s(&p).into(), s(&good_cand).into()],
        says: "truncated",
    });

    // Directories.
    let empty = d.join("no-shards");
    std::fs::create_dir_all(&empty).unwrap();
    std::fs::write(empty.join("README.txt"), "not a shard").unwrap();
    v.push(Case {
        name: "dir-without-shards",
        culprit: empty.clone(),
        args: vec!["compare".into(), s(&good_ref).into(), s(&empty).into()],
        says: "no *.safetensors shard",
    });
    let mixed = d.join("mixed-vocab");
    std::fs::create_dir_all(&mixed).unwrap();
    write(
        &mixed.join("part-0.safetensors"),
        vec![("logits", lg(3, 8, 9))],
        None,
    );
    write(
        &mixed.join("part-1.safetensors"),
        vec![("logits", lg(3, 9, 9))],
        None,
    );
    v.push(Case {
        name: "dir-shard-of-another-vocab",
        culprit: mixed.join("part-1.safetensors"),
        args: vec!["compare".into(), s(&good_ref).into(), s(&mixed).into()],
        says: "differs from the first shard",
    });
    let mixed = d.join("mixed-dtype");
    std::fs::create_dir_all(&mixed).unwrap();
    write(
        &mixed.join("part-0.safetensors"),
        vec![("logits", lg(3, 8, 9))],
        None,
    );
    write(
        &mixed.join("part-1.safetensors"),
        vec![("logits", floats(Dtype::BF16, &[3, 8], &logits(3, 8, 9)))],
        None,
    );
    v.push(Case {
        name: "dir-shard-of-another-dtype",
        culprit: mixed.join("part-1.safetensors"),
        args: vec!["compare".into(), s(&good_ref).into(), s(&mixed).into()],
        says: "differs from the first shard",
    });
    let mixed = d.join("mixed-targets");
    std::fs::create_dir_all(&mixed).unwrap();
    write(
        &mixed.join("part-0.safetensors"),
        vec![("logits", lg(3, 8, 9)), ("targets", i64s(&[3], &[1, 2, 3]))],
        None,
    );
    write(
        &mixed.join("part-1.safetensors"),
        vec![("logits", lg(3, 8, 9))],
        None,
    );
    v.push(Case {
        name: "dir-shards-disagree-on-targets",
        culprit: mixed.join("part-1.safetensors"),
        args: vec!["compare".into(), s(&good_ref).into(), s(&mixed).into()],
        says: "some shards have `targets`",
    });
    let mixed = d.join("broken-shard");
    std::fs::create_dir_all(&mixed).unwrap();
    write(
        &mixed.join("part-0.safetensors"),
        vec![("logits", lg(3, 8, 9))],
        None,
    );
    std::fs::write(mixed.join("part-1.safetensors"), &good_bytes[..30]).unwrap();
    v.push(Case {
        name: "dir-with-a-broken-shard",
        culprit: mixed.join("part-1.safetensors"),
        args: vec!["compare".into(), s(&good_ref).into(), s(&mixed).into()],
        says: "exceeds",
    });

    // Paths that are not files.
    let missing = d.join("missing.safetensors");
    v.push(Case {
        name: "missing-path",
        culprit: missing.clone(),
        args: vec!["compare".into(), s(&good_ref).into(), s(&missing).into()],
        says: "cannot open",
    });
    v.push(Case {
        name: "missing-reference",
        culprit: missing.clone(),
        args: vec!["compare".into(), s(&missing).into(), s(&good_cand).into()],
        says: "cannot open",
    });
    v.push(Case {
        name: "vocab-option-too-large",
        culprit: good_ref.clone(),
        args: vec![
            "compare".into(),
            s(&good_ref).into(),
            s(&good_cand).into(),
            "--vocab".into(),
            "9".into(),
        ],
        says: "fewer than --vocab 9",
    });
    v
}

#[test]
fn every_broken_input_exits_2_with_one_message_naming_the_file() {
    let dir = tempdir::Dir::new();
    let all = cases(dir.path());
    assert!(all.len() >= 60, "{} cases", all.len());
    for c in &all {
        check(dir.path(), c);
    }
}

#[cfg(unix)]
#[test]
fn a_pipe_as_input_is_refused_without_waiting_for_a_writer() {
    let dir = tempdir::Dir::new();
    let fifo = dir.path().join("logits.safetensors");
    let made = Command::new("mkfifo").arg(&fifo).status();
    if !matches!(made, Ok(st) if st.success()) {
        eprintln!("mkfifo not available; skipped");
        return;
    }
    let good_ref = dir.path().join("ref.safetensors");
    good(&good_ref, 1);
    let c = Case {
        name: "fifo",
        culprit: fifo.clone(),
        args: vec!["compare".into(), s(&good_ref).into(), s(&fifo).into()],
        says: "not a regular file",
    };
    check(dir.path(), &c);
}

#[test]
fn a_broken_tokenizer_is_refused() {
    let dir = tempdir::Dir::new();
    let (r, c) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    good(&r, 1);
    good(&c, 2);
    let tok = dir.path().join("tokenizer.json");
    std::fs::write(&tok, "{ not json").unwrap();
    let case = Case {
        name: "tokenizer-not-json",
        culprit: tok.clone(),
        args: vec![
            "compare".into(),
            s(&r).into(),
            s(&c).into(),
            "--tokenizer".into(),
            s(&tok).into(),
        ],
        says: "",
    };
    check(dir.path(), &case);
}

// ---------------------------------------------------------------- value faults

/// Reference and candidate rows with every kind of value fault, and what the
/// report must say about them.
#[test]
fn value_faults_are_counted_and_listed_and_means_stay_finite() {
    let dir = tempdir::Dir::new();
    let v = 4usize;
    let ninf = f32::NEG_INFINITY;
    // Row by row: (reference, candidate).
    let rows: Vec<([f32; 4], [f32; 4])> = vec![
        ([0.0, 1.0, 2.0, 3.0], [0.1, 1.0, 2.0, 3.0]), // 0 fine
        ([0.0, f32::NAN, 2.0, 3.0], [0.0, 1.0, 2.0, 3.0]), // 1 NaN in the reference
        ([0.0, 1.0, 2.0, 3.0], [0.0, 1.0, f32::NAN, 3.0]), // 2 NaN in the candidate
        ([0.0, 1.0, f32::INFINITY, 3.0], [0.0, 1.0, 2.0, 3.0]), // 3 +inf in the reference
        ([0.0, 1.0, 2.0, 3.0], [f32::INFINITY, 1.0, 2.0, 3.0]), // 4 +inf in the candidate
        ([ninf; 4], [0.0, 1.0, 2.0, 3.0]),            // 5 all -inf in the reference
        ([0.0, 1.0, 2.0, 3.0], [ninf; 4]),            // 6 all -inf in the candidate
        ([0.5, 1.0, 2.0, 3.0], [0.5, 1.0, 2.0, 2.5]), // 7 fine
        ([0.0, 1.0, 2.0, ninf], [0.0, 1.0, 2.0, 3.0]), // 8 -inf in the reference only: finite kl
        ([0.0, 1.0, 2.0, 3.0], [0.0, 1.0, 2.0, ninf]), // 9 -inf in the candidate where p > 0: kl = +inf
    ];
    let x: Vec<f32> = rows.iter().flat_map(|r| r.0).collect();
    let y: Vec<f32> = rows.iter().flat_map(|r| r.1).collect();
    let n = rows.len();
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    let tg: Vec<i64> = (0..n as i64).map(|i| i % v as i64).collect();
    write(
        &rp,
        vec![
            ("logits", floats(Dtype::F32, &[n, v], &x)),
            ("targets", i64s(&[n], &tg)),
        ],
        None,
    );
    write(
        &cp,
        vec![
            ("logits", floats(Dtype::F32, &[n, v], &y)),
            ("targets", i64s(&[n], &tg)),
        ],
        None,
    );
    let (j, c) = (dir.path().join("r.json"), dir.path().join("p.csv"));
    let out = klgauge(&["compare", s(&rp), s(&cp), "--json", s(&j), "--csv", s(&c)]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let rep = json(&j);
    let cand = &rep["candidates"][0];
    assert_eq!(cand["skipped_rows"], 6);
    let listed: Vec<(u64, String)> = cand["skipped"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| {
            (
                r["row"].as_u64().unwrap(),
                r["file"].as_str().unwrap().to_string(),
            )
        })
        .collect();
    let want: Vec<(u64, String)> = [
        (1, "reference"),
        (2, "candidate"),
        (3, "reference"),
        (4, "candidate"),
        (5, "reference"),
        (6, "candidate"),
    ]
    .iter()
    .map(|(r, f)| (*r, f.to_string()))
    .collect();
    assert_eq!(listed, want);
    let faults: Vec<&str> = cand["skipped"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["fault"].as_str().unwrap())
        .collect();
    assert!(
        faults[0].contains("NaN") && faults[2].contains("+inf") && faults[4].contains("-inf"),
        "{faults:?}"
    );
    assert_eq!(cand["positions"], 4);
    assert_eq!(cand["infinite_kl"], 1);
    // Row 9 makes the kl mean infinite and row 8 the reverse one (null in
    // JSON), but their medians and everything else stay finite: nothing was
    // poisoned by NaN.
    assert!(cand["kl"]["mean"].is_null());
    assert!(cand["kl_reverse"]["mean"].is_null());
    assert!(cand["kl"]["p50"].as_f64().unwrap().is_finite());
    assert!(cand["kl_reverse"]["p50"].as_f64().unwrap().is_finite());
    for m in ["tv", "entropy_ref", "entropy_cand", "nll_ref", "nll_cand"] {
        let x = cand[m]["mean"].as_f64().unwrap_or(f64::NAN);
        assert!(x.is_finite(), "{m} mean {x}");
    }
    assert!(cand["top1_agree"].as_f64().unwrap().is_finite());
    // The CSV lists exactly the counted rows.
    let text = std::fs::read_to_string(&c).unwrap();
    let counted: Vec<&str> = text
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap())
        .collect();
    assert_eq!(counted, vec!["0", "7", "8", "9"]);
    // The terminal report states both counts.
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("6 / 1"), "{stdout}");
    assert!(stdout.contains("6 rows were skipped"), "{stdout}");

    // Without the infinite row, the kl mean is finite too: KL over rows 0, 7, 8
    // from an f64 log-softmax (textbook definition, common practice).
    let keep = [0usize, 7, 8];
    let x2: Vec<f32> = keep
        .iter()
        .flat_map(|&i| rows[i].0)
        .chain(rows[1..7].iter().flat_map(|r| r.0))
        .collect();
    let y2: Vec<f32> = keep
        .iter()
        .flat_map(|&i| rows[i].1)
        .chain(rows[1..7].iter().flat_map(|r| r.1))
        .collect();
    write(
        &rp,
        vec![("logits", floats(Dtype::F32, &[9, v], &x2))],
        None,
    );
    write(
        &cp,
        vec![("logits", floats(Dtype::F32, &[9, v], &y2))],
        None,
    );
    let out = klgauge(&["compare", s(&rp), s(&cp), "--json", s(&j)]);
    assert_eq!(out.status.code(), Some(0));
    let cand = &json(&j)["candidates"][0];
    assert_eq!(cand["skipped_rows"], 6);
    let lsm = |r: &[f32]| -> Vec<f64> {
        let m = r.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b as f64));
        let z: f64 = r.iter().map(|&b| (b as f64 - m).exp()).sum();
        r.iter().map(|&b| b as f64 - m - z.ln()).collect()
    };
    let want: f64 = keep
        .iter()
        .map(|&i| {
            let (lp, lq) = (lsm(&rows[i].0), lsm(&rows[i].1));
            lp.iter()
                .zip(&lq)
                .map(|(a, b)| {
                    if a.is_finite() {
                        a.exp() * (a - b)
                    } else {
                        0.0
                    }
                })
                .sum::<f64>()
        })
        .sum::<f64>()
        / 3.0;
    let got = cand["kl"]["mean"].as_f64().unwrap();
    assert!(
        (got - want).abs() <= 1e-6 * want.max(1e-9),
        "{got} vs {want}"
    );
}

#[test]
fn a_run_where_every_row_is_faulty_or_masked_still_reports() {
    let dir = tempdir::Dir::new();
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    write(
        &rp,
        vec![("logits", floats(Dtype::F32, &[3, 4], &[f32::NAN; 12]))],
        None,
    );
    write(&cp, vec![("logits", lg(3, 4, 1))], None);
    let j = dir.path().join("r.json");
    let out = klgauge(&[
        "compare",
        s(&rp),
        s(&cp),
        "--json",
        s(&j),
        "--max-kl-mean",
        "1",
        "--min-top1",
        "0.5",
    ]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!err.contains("panicked"), "{err}");
    // Nothing counted: a gate has nothing to pass on and fails.
    assert_eq!(out.status.code(), Some(1), "{err}");
    let cand = &json(&j)["candidates"][0];
    assert_eq!(cand["skipped_rows"], 3);
    assert_eq!(cand["positions"], 0);
    assert!(cand["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|w| w.as_str().unwrap().contains("no position was counted")));

    write(
        &rp,
        vec![("logits", lg(3, 4, 2)), ("mask", u8s(&[3], &[0, 0, 0]))],
        None,
    );
    let out = klgauge(&["compare", s(&rp), s(&cp), "--json", s(&j)]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(json(&j)["candidates"][0]["positions"], 0);
}

// ---------------------------------------------------------------- output faults

#[cfg(target_os = "linux")]
#[test]
fn a_full_disk_fails_cleanly() {
    let full = Path::new("/dev/full");
    if !full.exists() {
        eprintln!("/dev/full not available; skipped");
        return;
    }
    let p = random_pair(50, 64, 5, 0.2, 21);
    let j = p.dir.path().join("r.json");
    for args in [
        vec!["--csv", "/dev/full", "--json", s(&j)],
        vec!["--json", "/dev/full"],
    ] {
        let before = listing(p.dir.path());
        let mut a = vec!["compare", s(&p.reference), s(&p.candidate)];
        a.extend(args.iter().copied());
        let out = run_limited(&a, Duration::from_secs(60));
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(
            err.contains("/dev/full") && err.to_lowercase().contains("no space"),
            "{err}"
        );
        assert!(
            !err.contains("panicked") && err.lines().count() <= 3,
            "{err}"
        );
        assert_eq!(listing(p.dir.path()), before, "{args:?}: a report was left");
    }
}

#[test]
fn unusable_destinations_are_refused_before_the_run() {
    let p = random_pair(10, 16, 2, 0.2, 22);
    let d = p.dir.path();
    let missing = d.join("no-such-dir").join("r.json");
    let sub = d.join("adir");
    std::fs::create_dir_all(&sub).unwrap();
    let r = d.join("r.json");
    let original = std::fs::read(&p.candidate).unwrap();
    for (args, culprit) in [
        (vec!["--json", s(&missing)], missing.clone()),
        (vec!["--csv", s(&missing)], missing.clone()),
        (vec!["--json", s(&sub)], sub.clone()),
        (vec!["--csv", s(&p.candidate)], p.candidate.clone()),
        (vec!["--json", s(&r), "--csv", s(&r)], r.clone()),
        (vec!["--json", s(&r), "--csv", s(&missing)], missing.clone()),
    ] {
        let before = listing(d);
        let mut a = vec!["compare", s(&p.reference), s(&p.candidate)];
        a.extend(args.iter().copied());
        let out = run_limited(&a, Duration::from_secs(60));
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(
            err.contains(&culprit.display().to_string()),
            "{args:?}: {err}"
        );
        assert!(
            !err.contains("panicked") && err.lines().count() <= 3,
            "{err}"
        );
        assert_eq!(listing(d), before, "{args:?}");
    }
    assert_eq!(
        std::fs::read(&p.candidate).unwrap(),
        original,
        "an input was overwritten"
    );
}

#[test]
fn a_closed_stdout_ends_quietly() {
    let p = random_pair(200, 64, 10, 0.2, 23);
    let mut child = Command::new(env!("CARGO_BIN_EXE_klgauge"))
        .args(["compare", s(&p.reference), s(&p.candidate)])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Close the reading end at once, as `| head -0` would: every write fails.
    drop(child.stdout.take());
    let out = wait_limited(child, Duration::from_secs(60));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!err.contains("panicked"), "{err}");
    assert!(err.trim().is_empty(), "{err}");
    assert_eq!(out.status.code(), Some(0));
}

#[cfg(unix)]
#[test]
fn piping_into_head_ends_quietly() {
    let p = random_pair(200, 64, 10, 0.2, 24);
    let errf = p.dir.path().join("stderr.txt");
    let script = format!(
        "'{}' compare '{}' '{}' 2>'{}' | head -1",
        env!("CARGO_BIN_EXE_klgauge"),
        s(&p.reference),
        s(&p.candidate),
        s(&errf)
    );
    let out = Command::new("sh").arg("-c").arg(&script).output().unwrap();
    assert_eq!(String::from_utf8_lossy(&out.stdout).lines().count(), 1);
    let err = std::fs::read_to_string(&errf).unwrap();
    assert!(err.is_empty(), "{err}");
}

fn wait_limited(mut child: Child, limit: Duration) -> Output {
    let start = Instant::now();
    while child.try_wait().unwrap().is_none() {
        if start.elapsed() > limit {
            let _ = child.kill();
            panic!("still running after {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    child.wait_with_output().unwrap()
}

/// Starts a long run, interrupts it while it computes (its CSV temporary
/// exists), and checks that it exits 130 leaving no report and no temporary.
#[cfg(unix)]
#[test]
fn an_interrupted_run_leaves_nothing_behind() {
    let dir = tempdir::Dir::new();
    let d = dir.path();
    // 1024 rows x 8192 F16 columns: 16 MiB per file. Listed as 48 candidates
    // (the same file) and with 64 draws per position, the run takes about 5 s
    // in a release build on a loaded 2-core machine; it is stopped after 0.2 s.
    let (rows, vocab) = (1024usize, 8192usize);
    let x = logits(rows, vocab, 31);
    let y: Vec<f32> = x.iter().map(|v| v + 0.01).collect();
    let (rp, cp) = (d.join("r.safetensors"), d.join("c.safetensors"));
    write(
        &rp,
        vec![("logits", floats(Dtype::F16, &[rows, vocab], &x))],
        None,
    );
    write(
        &cp,
        vec![("logits", floats(Dtype::F16, &[rows, vocab], &y))],
        None,
    );
    drop((x, y));
    let inputs = listing(d);
    let (j, c) = (d.join("r.json"), d.join("p.csv"));
    let mut args = vec!["compare".to_string(), s(&rp).into()];
    args.extend(std::iter::repeat_n(s(&cp).to_string(), 48));
    args.extend(
        [
            "--samples",
            "64",
            "--threads",
            "1",
            "--json",
            s(&j),
            "--csv",
            s(&c),
        ]
        .map(String::from),
    );
    let child = Command::new(env!("CARGO_BIN_EXE_klgauge"))
        .args(&args)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id();
    // Wait until the CSV temporary exists: the run is computing.
    let start = Instant::now();
    let mut child = child;
    loop {
        if listing(d).iter().any(|n| n.ends_with(".tmp")) {
            break;
        }
        if let Some(st) = child.try_wait().unwrap() {
            panic!("finished ({st}) before it could be interrupted");
        }
        assert!(
            start.elapsed() < Duration::from_secs(60),
            "no temporary appeared"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    std::thread::sleep(Duration::from_millis(200));
    assert!(
        child.try_wait().unwrap().is_none(),
        "the run was too short to interrupt"
    );
    let st = Command::new("kill")
        .args(["-INT", &pid.to_string()])
        .status()
        .unwrap();
    assert!(st.success());
    let out = wait_limited(child, Duration::from_secs(30));
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(130), "{err}");
    assert!(!err.contains("panicked"), "{err}");
    assert!(err.contains("interrupted"), "{err}");
    assert_eq!(listing(d), inputs, "a report or temporary was left");
}

#[test]
fn absurd_options_are_usage_errors_not_aborts() {
    let p = random_pair(10, 16, 2, 0.2, 25);
    for (args, says) in [
        (vec!["--samples", "100000000000"], "--samples"),
        (vec!["--samples=-1"], "--samples"),
        (vec!["--threads", "0"], "--threads"),
        (vec!["--vocab", "0"], "--vocab"),
        (vec!["--top", "x"], "--top"),
    ] {
        let mut a = vec!["compare", s(&p.reference), s(&p.candidate)];
        a.extend(args.iter().copied());
        let out = run_limited(&a, Duration::from_secs(60));
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(
            err.contains(says) && !err.contains("panicked"),
            "{args:?}: {err}"
        );
    }
}

/// Found by fuzzing (fuzz target `compare_pair`): rows whose logits carry a
/// large common offset used to lose precision in the f32 difference x - y (at
/// 1e7 the f32 spacing is 1, and a difference of 0.5 between the two models
/// vanished). A shift of every logit does not change the distribution (SPEC:
/// raw, centered and log-prob forms are the same distribution), so the pair
/// below must give the kl of the unshifted rows (f64 log-softmax, the textbook
/// definition, common practice). The kernel now differences rows at different
/// levels relative to their own maxima.
#[test]
fn a_common_offset_of_the_logits_changes_nothing() {
    let dir = tempdir::Dir::new();
    let c = 1.0e7f32;
    let base = [0.0f32, 1.0, 2.0, 3.0];
    let x: Vec<f32> = base.iter().map(|v| c + v).collect();
    let y = [0.5f32, 1.0, 2.0, 3.0];
    let lsm = |r: &[f32]| -> Vec<f64> {
        let m = r.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b as f64));
        let z: f64 = r.iter().map(|&b| (b as f64 - m).exp()).sum();
        r.iter().map(|&b| b as f64 - m - z.ln()).collect()
    };
    let (lp, lq) = (lsm(&base), lsm(&y));
    let want: f64 = lp.iter().zip(&lq).map(|(a, b)| a.exp() * (a - b)).sum();
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    write(&rp, vec![("logits", floats(Dtype::F32, &[1, 4], &x))], None);
    write(&cp, vec![("logits", floats(Dtype::F32, &[1, 4], &y))], None);
    let j = dir.path().join("r.json");
    let out = klgauge(&["compare", s(&rp), s(&cp), "--json", s(&j), "--samples", "0"]);
    assert_eq!(out.status.code(), Some(0));
    let got = json(&j)["candidates"][0]["kl"]["max"].as_f64().unwrap();
    assert!((got - want).abs() < 1e-4 * want, "kl {got}, want {want}");
}
