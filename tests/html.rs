//! The HTML report: self-contained, well-formed, escaped, and carrying what
//! the other formats carry (gates, ranking, worst positions with token text).

mod common;

use common::*;
use safetensors::tensor::Dtype;
use std::collections::HashMap;
use std::path::Path;

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Elements that never have a closing tag in HTML.
const VOID: [&str; 6] = ["meta", "br", "img", "input", "hr", "link"];

/// Walks the tags of a page and checks that every element is closed in the
/// right order (script and style contents are skipped). Returns the number
/// of elements per tag name.
fn check_nesting(page: &str) -> HashMap<String, usize> {
    let mut stack: Vec<String> = Vec::new();
    let mut counts = HashMap::new();
    let b = page.as_bytes();
    let mut i = 0;
    while let Some(off) = page[i..].find('<') {
        let start = i + off;
        let end = start + page[start..].find('>').expect("unterminated tag");
        let tag = &page[start + 1..end];
        i = end + 1;
        if tag.starts_with('!') {
            continue;
        }
        if let Some(name) = tag.strip_prefix('/') {
            let name = name.trim().to_ascii_lowercase();
            let open = stack
                .pop()
                .unwrap_or_else(|| panic!("</{name}> closes nothing at byte {start}"));
            assert_eq!(open, name, "</{name}> closes <{open}> at byte {start}");
            continue;
        }
        let name: String = tag
            .chars()
            .take_while(|c| c.is_ascii_alphanumeric())
            .collect::<String>()
            .to_ascii_lowercase();
        assert!(!name.is_empty(), "odd tag at byte {start}: <{tag}>");
        *counts.entry(name.clone()).or_insert(0) += 1;
        if tag.ends_with('/') || VOID.contains(&name.as_str()) {
            continue;
        }
        if name == "script" || name == "style" {
            let close = format!("</{name}>");
            let at = page[i..].find(&close).expect("unclosed script/style");
            i += at + close.len();
            continue;
        }
        stack.push(name);
        let _ = b;
    }
    assert!(stack.is_empty(), "unclosed elements: {stack:?}");
    counts
}

/// No reference to anything outside the file.
fn assert_self_contained(page: &str) {
    let lower = page.to_ascii_lowercase();
    for bad in ["http://", "https://", "src=", "<link", "@import", "url("] {
        assert!(!lower.contains(bad), "the page contains {bad:?}");
    }
}

/// Three prompts of 20 positions over a vocabulary of 8 byte-level tokens;
/// the candidate is close except in prompt 1, where it is far off.
fn fixture(
    dir: &Path,
    model: &str,
) -> (std::path::PathBuf, std::path::PathBuf, std::path::PathBuf) {
    let (g, l, v) = (3usize, 20usize, 8usize);
    let mut r = Rng(7);
    let x: Vec<f32> = (0..g * l * v).map(|_| (2.0 * r.normal()) as f32).collect();
    let y: Vec<f32> = x
        .iter()
        .enumerate()
        .map(|(i, &a)| {
            let prompt = i / (l * v);
            let noise = if prompt == 1 { 1.5 } else { 0.05 };
            (a as f64 + noise * r.normal()) as f32
        })
        .collect();
    let targets: Vec<i64> = (0..g * l).map(|i| (i * 5 % v) as i64).collect();
    let reference = dir.join("ref.safetensors");
    let candidate = dir.join("cand.safetensors");
    for (path, vals, name) in [(&reference, &x, "reference model"), (&candidate, &y, model)] {
        let meta: HashMap<String, String> = [("model".to_string(), name.to_string())]
            .into_iter()
            .collect();
        write(
            path,
            vec![
                ("logits", floats(Dtype::F32, &[g, l, v], vals)),
                ("targets", i64s(&[g, l], &targets)),
            ],
            Some(meta),
        );
    }
    // Byte-level markers: U+0120 is a space, U+010A a newline (GPT-2 byte table).
    let tok = dir.join("tokenizer.json");
    std::fs::write(
        &tok,
        r#"{"model":{"type":"BPE","vocab":{"<s>":0,"\u0120heron":1,"\u0120weir":2,"\u010A":3,"ing":4,"\u0120lantern":5,"\u0120&":6,"\u0120<b>":7}},"added_tokens":[]}"#,
    )
    .unwrap();
    (reference, candidate, tok)
}

#[test]
fn page_is_self_contained_well_formed_and_has_plots() {
    let dir = tempdir::Dir::new();
    let (r, c, tok) = fixture(dir.path(), "Tern <q4> & \"friends\"");
    let html = dir.path().join("r.html");
    let out = klgauge(&[
        "compare",
        s(&r),
        s(&c),
        s(&r),
        "--tokenizer",
        s(&tok),
        "--html",
        s(&html),
        "--max-kl-mean",
        "0.5",
        "--max-kl-p99",
        "0.1",
        "--min-top1",
        "0.9",
    ]);
    assert!(
        out.status.code() == Some(1) || out.status.code() == Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = std::fs::read_to_string(&html).unwrap();
    assert!(page.starts_with("<!DOCTYPE html>"));
    assert_self_contained(&page);
    let counts = check_nesting(&page);
    // Distribution (2), tail (1), position (2), estimators (2), pairs (1): one
    // "plot" SVG each, plus the small gate strips.
    let plots = page.matches(r#"<svg class="plot"#).count();
    assert!(plots >= 8, "{plots} plots");
    assert!(counts["svg"] > plots, "gate strips missing");
    for class in ["bar", "cumline", "tailline", "band", "meanline", "est"] {
        assert!(
            page.contains(&format!(r#"class="{class}""#)),
            "no {class} marks"
        );
    }
    // The name with markup in it is escaped everywhere, never raw.
    assert!(!page.contains("Tern <q4>"));
    assert!(page.contains("Tern &lt;q4&gt; &amp; &quot;friends&quot;"));
    // Tokens come with readable text; a token spelled "<b>" is escaped.
    assert!(page.contains("␣heron") || page.contains("␣weir") || page.contains("␣lantern"));
    assert!(!page.contains("<b>\u{2423}") && !page.contains("\u{2423}<b>"));
    // Gates, ranking and paired differences are all on the page.
    assert!(page.contains("mean kl at most 0.500"));
    assert!(page.contains("99th percentile of kl at most 0.100"));
    assert!(page.contains("top-1 agreement at least 90.00%"));
    assert!(page.contains(r#"id="ranking""#));
    assert!(page.contains("Paired differences"));
}

#[test]
fn html_follows_the_exit_code_rules() {
    // A gate fails: the page is still written and the exit code is 1.
    let dir = tempdir::Dir::new();
    let (r, c, _) = fixture(dir.path(), "cand");
    let html = dir.path().join("r.html");
    let out = klgauge(&[
        "compare",
        s(&r),
        s(&c),
        "--html",
        s(&html),
        "--max-kl-mean",
        "1e-9",
    ]);
    assert_eq!(out.status.code(), Some(1));
    let page = std::fs::read_to_string(&html).unwrap();
    assert!(page.contains("fails 1 of 1 gates"));
    // A missing directory for the page: exit 2, nothing else written.
    let json = dir.path().join("r.json");
    let out = klgauge(&[
        "compare",
        s(&r),
        s(&c),
        "--json",
        s(&json),
        "--html",
        "/nonexistent-dir/r.html",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("/nonexistent-dir/r.html"));
}

#[test]
fn tokenizer_puts_text_and_context_into_json_worst_positions() {
    let dir = tempdir::Dir::new();
    let (r, c, tok) = fixture(dir.path(), "cand");
    let json_path = dir.path().join("r.json");
    let out = klgauge(&[
        "compare",
        s(&r),
        s(&c),
        "--tokenizer",
        s(&tok),
        "--json",
        s(&json_path),
        "--top",
        "5",
    ]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v = json(&json_path);
    let worst = v["candidates"][0]["worst_positions"].as_array().unwrap();
    assert_eq!(worst.len(), 5);
    let vocab = [
        "<s>", " heron", " weir", "\\n", "ing", " lantern", " &", " <b>",
    ];
    for w in worst {
        // The candidate is far off only in prompt 1.
        assert_eq!(w["prompt"], 1, "{w}");
        for t in w["ref_top"]
            .as_array()
            .unwrap()
            .iter()
            .chain(w["cand_top"].as_array().unwrap())
        {
            let id = t["id"].as_u64().unwrap() as usize;
            assert_eq!(t["text"].as_str().unwrap(), vocab[id], "token {id}");
        }
        let target = w["target"].as_i64().unwrap() as usize;
        assert_eq!(w["target_text"].as_str().unwrap(), vocab[target]);
        // Context: the input tokens before the position, oldest first, at most
        // 8; the input token at position k is the target of position k - 1.
        let pos = w["position"].as_u64().unwrap() as usize;
        let row = w["row"].as_u64().unwrap() as usize;
        let ctx: Vec<&str> = w["context"]
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_str().unwrap())
            .collect();
        assert_eq!(ctx.len(), pos.min(8), "position {pos}");
        for (j, t) in ctx.iter().enumerate() {
            let input_row = row - ctx.len() + j;
            let id = input_row * 5 % 8;
            assert_eq!(*t, vocab[id]);
        }
    }
    // The terminal summary shows them too.
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("worst positions, highest kl first"), "{text}");
    assert!(text.contains("worst prompts, highest mean kl first"));
}

#[test]
fn p99_gate_is_uncertain_when_its_limit_is_inside_the_interval() {
    let dir = tempdir::Dir::new();
    let (r, c, _) = fixture(dir.path(), "cand");
    let j = dir.path().join("r.json");
    klgauge(&["compare", s(&r), s(&c), "--json", s(&j)]);
    let v = json(&j);
    let ci = v["candidates"][0]["kl_p99_ci95"].as_array().unwrap();
    let (lo, hi) = (ci[0].as_f64().unwrap(), ci[1].as_f64().unwrap());
    let p99 = v["candidates"][0]["kl"]["p99"].as_f64().unwrap();
    assert!(lo <= p99 && p99 <= hi && lo < hi, "{lo} {p99} {hi}");
    let mid = format!("{}", 0.5 * (lo + p99));
    let far = format!("{}", 10.0 * hi);
    klgauge(&[
        "compare",
        s(&r),
        s(&c),
        "--json",
        s(&j),
        "--max-kl-p99",
        &mid,
    ]);
    let g = &json(&j)["candidates"][0]["gates"][0];
    assert_eq!(g["name"], "max-kl-p99");
    assert_eq!(g["uncertain"], true);
    assert_eq!(g["pass"], false);
    klgauge(&[
        "compare",
        s(&r),
        s(&c),
        "--json",
        s(&j),
        "--max-kl-p99",
        &far,
    ]);
    let g = &json(&j)["candidates"][0]["gates"][0];
    assert_eq!(g["uncertain"], false);
    assert_eq!(g["pass"], true);
}

#[test]
fn ranking_and_pairs_name_the_candidates() {
    let dir = tempdir::Dir::new();
    let (r, c, _) = fixture(dir.path(), "far");
    let j = dir.path().join("r.json");
    // The reference against itself ranks first (kl 0).
    let out = klgauge(&["compare", s(&r), s(&c), s(&r), "--json", s(&j)]);
    assert_eq!(out.status.code(), Some(0));
    let v = json(&j);
    let rank = v["ranking"].as_array().unwrap();
    assert_eq!(rank[0]["candidate"], 1);
    assert_eq!(rank[0]["name"], "reference model");
    assert_eq!(rank[1]["name"], "far");
    let p = &v["comparisons"][0];
    assert_eq!(p["a_name"], "far");
    assert_eq!(p["b_name"], "reference model");
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("ranking by mean kl"));
    assert!(text.contains("far minus reference model"));
}

#[test]
fn histogram_and_position_bins_count_every_position() {
    let dir = tempdir::Dir::new();
    let (r, c, _) = fixture(dir.path(), "cand");
    let j = dir.path().join("r.json");
    klgauge(&["compare", s(&r), s(&c), "--json", s(&j)]);
    let v = json(&j);
    let cand = &v["candidates"][0];
    let n = cand["positions"].as_u64().unwrap();
    let h = &cand["kl_histogram"];
    let in_bins: u64 = h["bins"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b["count"].as_u64().unwrap())
        .sum();
    assert_eq!(
        in_bins + h["below"].as_u64().unwrap() + h["above"].as_u64().unwrap(),
        n
    );
    let by_pos = cand["kl_by_position"].as_array().unwrap();
    assert_eq!(
        by_pos
            .iter()
            .map(|b| b["positions"].as_u64().unwrap())
            .sum::<u64>(),
        n
    );
    // Positions 0..15 have a bin each; 16-17 and 18-19 share one.
    assert_eq!(by_pos.len(), 16 + 2);
    assert_eq!(by_pos[16]["first"], 16);
    assert_eq!(by_pos[16]["last"], 17);
    // Each bin's mean equals the mean of the CSV lines of its positions.
    let csv = dir.path().join("p.csv");
    klgauge(&["compare", s(&r), s(&c), "--csv", s(&csv)]);
    let text = std::fs::read_to_string(&csv).unwrap();
    let mut sums = vec![(0f64, 0u64); 20];
    for line in text.lines().skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        let pos: usize = f[2].parse().unwrap();
        let kl: f64 = f[4].parse().unwrap();
        sums[pos].0 += kl;
        sums[pos].1 += 1;
    }
    for b in by_pos {
        let (a, z) = (
            b["first"].as_u64().unwrap() as usize,
            b["last"].as_u64().unwrap() as usize,
        );
        let (s, k) = sums[a..=z]
            .iter()
            .fold((0.0, 0), |acc, x| (acc.0 + x.0, acc.1 + x.1));
        let mean = b["kl_mean"].as_f64().unwrap();
        assert!(
            (mean - s / k as f64).abs() <= 1e-12 * mean.abs().max(1e-300) + 1e-15,
            "bin {a}-{z}"
        );
    }
}

#[test]
fn degenerate_inputs_still_make_a_well_formed_page() {
    // The reference against itself (every kl is 0), no targets, no
    // estimators, one prompt per row: nothing to plot, but the page must
    // still be complete and say so through its warnings.
    let dir = tempdir::Dir::new();
    let mut r = Rng(3);
    let x: Vec<f32> = (0..12 * 6).map(|_| r.normal() as f32).collect();
    let f = dir.path().join("same.safetensors");
    write(&f, vec![("logits", floats(Dtype::F32, &[12, 6], &x))], None);
    let html = dir.path().join("r.html");
    let out = klgauge(&[
        "compare",
        s(&f),
        s(&f),
        "--samples",
        "0",
        "--html",
        s(&html),
        "--max-kl-p99",
        "0.01",
        "--bits",
    ]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let page = std::fs::read_to_string(&html).unwrap();
    assert_self_contained(&page);
    check_nesting(&page);
    assert!(page.contains("divergences in bits"));
    assert!(page.contains("no targets"));
    assert!(page.contains("every row counts as its own prompt"));
}

#[test]
fn merged_shards_carry_the_plot_data_and_the_p99_interval() {
    // The binned kl, the position profile and the tail sums travel in the
    // partial results: a merged report has the same histogram and bins as a
    // single run, and an interval for p99.
    let dir = tempdir::Dir::new();
    let (r, c, _) = fixture(dir.path(), "cand");
    let single = dir.path().join("single.json");
    klgauge(&["compare", s(&r), s(&c), "--json", s(&single)]);
    let mut parts = Vec::new();
    for i in 0..3 {
        let p = dir.path().join(format!("part{i}.json"));
        let out = klgauge(&[
            "compare",
            s(&r),
            s(&c),
            "--shard",
            &format!("{i}/3"),
            "--partial",
            s(&p),
        ]);
        assert_eq!(
            out.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        parts.push(p);
    }
    let merged = dir.path().join("merged.json");
    let html = dir.path().join("merged.html");
    let mut args = vec!["merge"];
    args.extend(parts.iter().map(|p| s(p)));
    args.extend(["--json", s(&merged), "--html", s(&html)]);
    let out = klgauge(&args);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let (a, b) = (json(&single), json(&merged));
    let (a, b) = (&a["candidates"][0], &b["candidates"][0]);
    assert_eq!(a["kl_histogram"], b["kl_histogram"]);
    let (pa, pb) = (
        a["kl_by_position"].as_array().unwrap(),
        b["kl_by_position"].as_array().unwrap(),
    );
    assert_eq!(pa.len(), pb.len());
    for (x, y) in pa.iter().zip(pb) {
        for k in [
            "first",
            "last",
            "positions",
            "kl_p50",
            "kl_p90",
            "top1_agree",
        ] {
            assert_eq!(x[k], y[k], "{k}");
        }
        let (mx, my) = (
            x["kl_mean"].as_f64().unwrap(),
            y["kl_mean"].as_f64().unwrap(),
        );
        assert!((mx - my).abs() <= 1e-12 * mx.abs(), "{mx} vs {my}");
    }
    assert!(b["kl_p99_ci95"].is_array(), "{}", b["kl_p99_ci95"]);
    let page = std::fs::read_to_string(&html).unwrap();
    assert_self_contained(&page);
    check_nesting(&page);
    for class in ["bar", "cumline", "tailline", "band", "meanline"] {
        assert!(
            page.contains(&format!(r#"class="{class}""#)),
            "no {class} marks after merge"
        );
    }
}
