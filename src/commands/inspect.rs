//! `klgauge inspect FILE`: what a dump holds and whether it follows the
//! layout, before anything is compared.
//!
//! It lists the tensors of every file (names, dtypes, shapes, sizes), runs the
//! same validation `compare` and `estimate` run (a file that fails it is an
//! input error, exit 2, with the same message), and then lists softer
//! findings as notes with exit 0: no prompt grouping, no targets, raw logits
//! in a 16-bit format, a declared `logits_form` the values contradict,
//! faulty rows, tensors the layout does not know. For a logit file it also
//! gives value statistics on an evenly spaced sample of rows and the
//! divergence floor that the storage dtype alone causes (`floor`).
//!
//! The floor of a single file is that of comparing it with another file
//! stored the same way: both sides rounded at this file's dtype, with
//! independent rounding errors (as with two models whose logits differ by
//! more than a rounding step). Two copies of one file are identical and have
//! no floor at all; the number is what rounding adds to a real comparison.
//!
//! # JSON output, schema `klgauge-inspect/1`
//!
//! ```text
//! {
//!   "schema": "klgauge-inspect/1", "tool": {"name", "version"},
//!   "path", "kind": "logits" | "logprobs",
//!   "files": [{"path", "bytes", "tensors": [{"name", "dtype", "shape", "bytes"}]}],
//!   "metadata": {key: value},                       // of the first file
//!   "logits": null | {"dtype", "rows", "vocab", "shape", "prompts",
//!                     "grouping": "sequences" | "offsets" | "rows",
//!                     "targets", "mask": null | {"counted", "padding"},
//!                     "logits_form": declared string | null},
//!   "values": null | {"rows_sampled", "faulty_rows", "min", "max", "mean",
//!                     "neg_inf_fraction", "row_max_mean", "row_logsumexp_mean",
//!                     "looks": "raw" | "centered" | "logprobs"},
//!   "storage_floor": null | {"nats", "dtype", "basis", "if_centered": nats | null},
//!   "logprobs": null | {"draws", "prompts", "grouping": "offsets" | "rows",
//!                       "skipped", "infinite",
//!                       "logprob_ref": {"min", "max", "mean"}, "logprob_cand": {...}},
//!   "notes": [string]
//! }
//! ```
//! Statistics are over finite values only; non-finite numbers are `null`.

use crate::error::{Error, Result};
use crate::floor;
use crate::input::file::MappedFile;
use crate::input::{Grouping, LogitFile, LogprobFile, StoredDtype};
use crate::output::write_atomic;
use crate::report::ToolInfo;
use serde::Serialize;
use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

pub const SCHEMA: &str = "klgauge-inspect/1";

/// Rows read for value statistics and the floor.
pub const SAMPLE_ROWS: usize = 64;

/// |log-sum-exp| below this in every sampled row: the rows are log-probabilities.
const LOGPROB_LSE: f64 = 0.02;

const LOGIT_TENSORS: [&str; 4] = ["logits", "targets", "mask", "prompt_offsets"];
/// `tokens` (the drawn token ids, I64 [n]) is optional and informational.
const LOGPROB_TENSORS: [&str; 4] = ["logprob_ref", "logprob_cand", "prompt_offsets", "tokens"];

#[derive(Debug, Clone, Default)]
pub struct InspectArgs {
    pub file: PathBuf,
    pub json: Option<PathBuf>,
}

#[derive(Debug, Clone, Serialize)]
pub struct TensorInfo {
    pub name: String,
    pub dtype: String,
    pub shape: Vec<usize>,
    pub bytes: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct FileEntry {
    pub path: String,
    pub bytes: u64,
    pub tensors: Vec<TensorInfo>,
}

#[derive(Debug, Clone, Serialize)]
pub struct MaskInfo {
    pub counted: u64,
    pub padding: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct LogitLayout {
    pub dtype: &'static str,
    pub rows: u64,
    pub vocab: u64,
    pub shape: Vec<usize>,
    pub prompts: u64,
    pub grouping: &'static str,
    pub targets: bool,
    pub mask: Option<MaskInfo>,
    pub logits_form: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ValueStats {
    pub rows_sampled: u64,
    /// Sampled rows holding NaN, +inf or only -inf (compare skips them).
    pub faulty_rows: u64,
    pub min: f64,
    pub max: f64,
    pub mean: f64,
    pub neg_inf_fraction: f64,
    pub row_max_mean: f64,
    pub row_logsumexp_mean: f64,
    pub looks: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct FloorInfo {
    /// Expected KL per position from storage rounding alone, in nats.
    pub nats: f64,
    pub dtype: &'static str,
    pub basis: &'static str,
    /// The floor if the same rows were stored minus their maximum, same dtype
    /// (given for raw logits in a 16-bit format).
    pub if_centered: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Range3 {
    pub min: f64,
    pub max: f64,
    pub mean: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct LogprobSummary {
    pub draws: u64,
    pub prompts: u64,
    pub grouping: &'static str,
    pub skipped: u64,
    pub infinite: u64,
    pub logprob_ref: Range3,
    pub logprob_cand: Range3,
}

#[derive(Debug, Clone, Serialize)]
pub struct InspectReport {
    pub schema: &'static str,
    pub tool: ToolInfo,
    pub path: String,
    pub kind: &'static str,
    pub files: Vec<FileEntry>,
    pub metadata: BTreeMap<String, String>,
    pub logits: Option<LogitLayout>,
    pub values: Option<ValueStats>,
    pub storage_floor: Option<FloorInfo>,
    pub logprobs: Option<LogprobSummary>,
    pub notes: Vec<String>,
}

pub const FLOOR_BASIS: &str = "against another file stored the same way: both sides rounded at this dtype, with independent rounding errors";

/// The files a path stands for: itself, or the shards of a directory in
/// lexical order (the rule of `LogitFile::open`).
fn files_of(path: &Path) -> Result<Vec<PathBuf>> {
    let meta =
        std::fs::metadata(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
    if !meta.is_dir() {
        return Ok(vec![path.to_path_buf()]);
    }
    let mut v: Vec<PathBuf> = std::fs::read_dir(path)
        .map_err(|e| Error::input(path, format!("cannot list directory: {e}")))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_file() && p.extension().is_some_and(|x| x == "safetensors"))
        .collect();
    v.sort();
    if v.is_empty() {
        return Err(Error::input(path, "directory holds no *.safetensors shard"));
    }
    Ok(v)
}

fn entry(f: &MappedFile) -> FileEntry {
    FileEntry {
        path: f.path.display().to_string(),
        bytes: f.map.len() as u64,
        tensors: f
            .tensors
            .iter()
            .map(|(n, t)| TensorInfo {
                name: n.clone(),
                dtype: t.dtype.to_string(),
                shape: t.shape.clone(),
                bytes: (t.end - t.start) as u64,
            })
            .collect(),
    }
}

/// Validates the file, gathers everything, and writes `--json` if asked.
pub fn inspect(args: &InspectArgs) -> Result<InspectReport> {
    let report = build(&args.file)?;
    if let Some(p) = &args.json {
        write_atomic(p, |w| {
            serde_json::to_writer_pretty(&mut *w, &report)?;
            w.write_all(b"\n")
        })?;
    }
    Ok(report)
}

pub fn build(path: &Path) -> Result<InspectReport> {
    let paths = files_of(path)?;
    let mapped = paths
        .iter()
        .map(|p| MappedFile::open(p))
        .collect::<Result<Vec<_>>>()?;
    let first = &mapped[0];
    let is_logits = first.tensors.contains_key("logits");
    let is_logprobs =
        first.tensors.contains_key("logprob_ref") || first.tensors.contains_key("logprob_cand");
    let mut report = InspectReport {
        schema: SCHEMA,
        tool: ToolInfo::current(),
        path: path.display().to_string(),
        kind: "logits",
        files: mapped.iter().map(entry).collect(),
        metadata: first.metadata.clone(),
        logits: None,
        values: None,
        storage_floor: None,
        logprobs: None,
        notes: Vec::new(),
    };
    if is_logits {
        let lf = LogitFile::open(path)?;
        // What compare checks of one file beyond the reader: targets inside the vocabulary.
        crate::engine::check_alignment(&lf, &[])?;
        logit_findings(&lf, &mut report);
        for f in &mapped {
            unknown_tensors(f, &LOGIT_TENSORS, &mut report.notes);
        }
    } else if is_logprobs {
        if mapped.len() > 1 {
            return Err(Error::input(
                path,
                "a log-probability file is one safetensors file, not a directory of shards",
            ));
        }
        let lp = LogprobFile::from_mapped(first)?;
        report.kind = "logprobs";
        logprob_findings(&lp, &mut report);
        unknown_tensors(first, &LOGPROB_TENSORS, &mut report.notes);
    } else {
        let found = if first.tensors.is_empty() {
            "no tensors".to_string()
        } else {
            first
                .tensors
                .keys()
                .map(|k| format!("`{k}`"))
                .collect::<Vec<_>>()
                .join(", ")
        };
        return Err(Error::input(
            &first.path,
            format!("holds neither `logits` (a logit file) nor `logprob_ref`/`logprob_cand` (a log-probability file); found: {found}"),
        ));
    }
    if !["model", "model_ref", "model_cand"]
        .iter()
        .any(|k| report.metadata.contains_key(*k))
    {
        report.notes.push(
            "no `model` in the metadata: reports will name this file by its path only".into(),
        );
    }
    Ok(report)
}

fn unknown_tensors(f: &MappedFile, known: &[&str], notes: &mut Vec<String>) {
    for name in f.tensors.keys() {
        if !known.contains(&name.as_str()) {
            notes.push(format!(
                "{}: tensor `{name}` is not part of the layout and is ignored",
                f.path.display()
            ));
        }
    }
}

/// Value statistics and the storage floor of one row sample.
struct RowSample {
    stats: ValueStats,
    floor: f64,
    floor_centered: f64,
}

fn sample_rows(lf: &LogitFile) -> RowSample {
    let counted: Vec<usize> = match &lf.mask {
        Some(m) => (0..lf.rows).filter(|&r| m[r]).collect(),
        None => Vec::new(),
    };
    let pool = if lf.mask.is_some() {
        counted.len()
    } else {
        lf.rows
    };
    let take = pool.min(SAMPLE_ROWS);
    let mut x = vec![0f32; lf.vocab];
    let (mut min, mut max, mut sum, mut finite, mut neg_inf, mut total) =
        (f64::INFINITY, f64::NEG_INFINITY, 0f64, 0u64, 0u64, 0u64);
    let (mut faulty, mut good) = (0u64, 0u64);
    let (mut max_sum, mut lse_sum) = (0f64, 0f64);
    let (mut all_lse_zero, mut all_max_zero) = (true, true);
    let (mut fl, mut flc, mut nfl) = (0f64, 0f64, 0u64);
    let mut centered = vec![0f32; lf.vocab];
    for i in 0..take {
        let k = i * pool / take;
        let row = if lf.mask.is_some() { counted[k] } else { k };
        lf.read_row(row, &mut x);
        let bad = x.iter().any(|v| v.is_nan() || *v == f32::INFINITY)
            || x.iter().all(|v| *v == f32::NEG_INFINITY);
        if bad {
            faulty += 1;
            continue;
        }
        good += 1;
        let m = x.iter().cloned().fold(f32::NEG_INFINITY, f32::max);
        let mut s = 0f64;
        for &v in &x {
            total += 1;
            if v == f32::NEG_INFINITY {
                neg_inf += 1;
                continue;
            }
            let v64 = v as f64;
            min = min.min(v64);
            max = max.max(v64);
            sum += v64;
            finite += 1;
            s += (v64 - m as f64).exp();
        }
        let lse = m as f64 + s.ln();
        max_sum += m as f64;
        lse_sum += lse;
        all_lse_zero &= lse.abs() <= LOGPROB_LSE;
        all_max_zero &= m == 0.0;
        let f = floor::row_floor(&x, lf.dtype, &x, lf.dtype);
        for (c, &v) in centered.iter_mut().zip(&x) {
            *c = v - m;
        }
        let fc = floor::row_floor(&centered, lf.dtype, &centered, lf.dtype);
        if f.is_finite() && fc.is_finite() {
            fl += f;
            flc += fc;
            nfl += 1;
        }
    }
    let g = good.max(1) as f64;
    let looks = if good == 0 {
        "raw"
    } else if all_lse_zero {
        "logprobs"
    } else if all_max_zero {
        "centered"
    } else {
        "raw"
    };
    let nan_if = |c: bool, v: f64| if c { v } else { f64::NAN };
    RowSample {
        stats: ValueStats {
            rows_sampled: take as u64,
            faulty_rows: faulty,
            min: nan_if(finite > 0, min),
            max: nan_if(finite > 0, max),
            mean: nan_if(finite > 0, sum / finite.max(1) as f64),
            neg_inf_fraction: nan_if(total > 0, neg_inf as f64 / total.max(1) as f64),
            row_max_mean: nan_if(good > 0, max_sum / g),
            row_logsumexp_mean: nan_if(good > 0, lse_sum / g),
            looks,
        },
        floor: nan_if(nfl > 0, fl / nfl.max(1) as f64),
        floor_centered: nan_if(nfl > 0, flc / nfl.max(1) as f64),
    }
}

fn logit_findings(lf: &LogitFile, r: &mut InspectReport) {
    let declared = lf.metadata.get("logits_form").cloned();
    r.logits = Some(LogitLayout {
        dtype: lf.dtype.name(),
        rows: lf.rows as u64,
        vocab: lf.vocab as u64,
        shape: lf.shape.clone(),
        prompts: lf.prompts() as u64,
        grouping: lf.grouping.name(),
        targets: lf.targets.is_some(),
        mask: lf.mask.as_ref().map(|m| {
            let c = m.iter().filter(|&&b| b).count() as u64;
            MaskInfo {
                counted: c,
                padding: m.len() as u64 - c,
            }
        }),
        logits_form: declared.clone(),
    });
    let s = sample_rows(lf);
    let notes = &mut r.notes;
    if matches!(lf.grouping, Grouping::PerRow) {
        notes.push("no prompt grouping (neither a 3-D `logits` nor `prompt_offsets`): every row counts as its own prompt, so the intervals of compare will ignore the correlation within a prompt and be too narrow".into());
    }
    if lf.targets.is_none() {
        notes.push("no targets: compare cannot give perplexities or the token context of the worst positions".into());
    }
    if let Some(m) = &r.logits.as_ref().unwrap().mask {
        if m.padding > 0 {
            notes.push(format!(
                "`mask` marks {} of {} rows as padding; they are not counted",
                m.padding, lf.rows
            ));
        }
        if m.counted == 0 {
            notes.push("`mask` marks every row as padding: compare would count nothing".into());
        }
    }
    let half = lf.dtype != StoredDtype::F32;
    if s.stats.looks == "raw" && half && s.stats.rows_sampled > s.stats.faulty_rows {
        notes.push(format!(
            "raw (uncentered) logits stored in {}: large rounding floor, about {:.2e} nats per position against another file stored this way, from rounding alone; stored minus the row maximum it would be {:.2e} nats (or store F32)",
            lf.dtype.name(),
            s.floor,
            s.floor_centered
        ));
    }
    match declared.as_deref() {
        None => {}
        Some("raw") => {}
        Some("centered") if s.stats.looks != "centered" && s.stats.looks != "logprobs" => notes.push(format!(
            "metadata says logits_form = centered, but the sampled rows do not have a maximum of 0 (mean row maximum {:.3})",
            s.stats.row_max_mean
        )),
        Some("logprobs") if s.stats.looks != "logprobs" => notes.push(format!(
            "metadata says logits_form = logprobs, but the sampled rows' log-sum-exp is not 0 (mean {:.3})",
            s.stats.row_logsumexp_mean
        )),
        Some("centered") | Some("logprobs") => {}
        Some(other) => notes.push(format!("metadata logits_form = `{other}` is none of raw, centered, logprobs; it is ignored")),
    }
    if s.stats.faulty_rows > 0 {
        notes.push(format!(
            "{} of {} sampled rows hold NaN, +inf or only -inf: compare skips and lists such rows",
            s.stats.faulty_rows, s.stats.rows_sampled
        ));
    }
    if s.stats.neg_inf_fraction > 0.0 {
        notes.push(format!(
            "{:.3}% of the sampled logits are -inf: a candidate with -inf where the reference has mass gives an infinite kl",
            100.0 * s.stats.neg_inf_fraction
        ));
    }
    if lf.rows < crate::report::FEW_POSITIONS as usize {
        notes.push(format!(
            "only {} rows: percentiles and intervals from this file will be rough",
            lf.rows
        ));
    }
    r.storage_floor = Some(FloorInfo {
        nats: s.floor,
        dtype: lf.dtype.name(),
        basis: FLOOR_BASIS,
        if_centered: (half && s.stats.looks == "raw").then_some(s.floor_centered),
    });
    r.values = Some(s.stats);
}

fn range3(v: &[f32]) -> Range3 {
    let (mut min, mut max, mut sum, mut n) = (f64::INFINITY, f64::NEG_INFINITY, 0f64, 0u64);
    for &x in v.iter().filter(|x| x.is_finite()) {
        let x = x as f64;
        min = min.min(x);
        max = max.max(x);
        sum += x;
        n += 1;
    }
    if n == 0 {
        return Range3 {
            min: f64::NAN,
            max: f64::NAN,
            mean: f64::NAN,
        };
    }
    Range3 {
        min,
        max,
        mean: sum / n as f64,
    }
}

fn logprob_findings(lp: &LogprobFile, r: &mut InspectReport) {
    let (mut skipped, mut infinite) = (0u64, 0u64);
    for i in 0..lp.n {
        match lp.log_ratio(i) {
            Ok(v) if v == f64::NEG_INFINITY => infinite += 1,
            Ok(_) => {}
            Err(_) => skipped += 1,
        }
    }
    r.logprobs = Some(LogprobSummary {
        draws: lp.n as u64,
        prompts: lp.prompts() as u64,
        grouping: lp.grouping.name(),
        skipped,
        infinite,
        logprob_ref: range3(&lp.logprob_ref),
        logprob_cand: range3(&lp.logprob_cand),
    });
    let notes = &mut r.notes;
    if matches!(lp.grouping, Grouping::PerRow) {
        notes.push("no prompt grouping (no `prompt_offsets`): every draw counts as its own prompt, so the intervals of estimate will ignore the correlation within a prompt and be too narrow".into());
    }
    if skipped > 0 {
        notes.push(format!("{skipped} draws hold NaN, +inf, or a reference log-probability of -inf: estimate skips and lists them"));
    }
    if infinite > 0 {
        notes.push(format!("{infinite} draws have a candidate log-probability of -inf: the estimated KL(p||q) is infinite"));
    }
    if lp.n < crate::commands::estimate::FEW_DRAWS as usize {
        notes.push(format!("only {} draws: the estimates will be rough", lp.n));
    }
    notes.push("per-token log-probabilities have no full rows: there is no storage floor to give; `klgauge estimate` computes the estimators".into());
}

use crate::report::text::sci;

fn size(b: u64) -> String {
    const U: [&str; 5] = ["B", "KiB", "MiB", "GiB", "TiB"];
    let mut v = b as f64;
    let mut i = 0;
    while v >= 1024.0 && i + 1 < U.len() {
        v /= 1024.0;
        i += 1;
    }
    if i == 0 {
        format!("{b} B")
    } else {
        format!("{v:.1} {}", U[i])
    }
}

/// Shards listed in full on the terminal; the JSON lists all.
const SHARDS_SHOWN: usize = 3;

/// The terminal summary.
pub fn write_text(r: &InspectReport, out: &mut dyn Write) -> std::io::Result<()> {
    let total: u64 = r.files.iter().map(|f| f.bytes).sum();
    let shards = if r.files.len() == 1 {
        "one file".to_string()
    } else {
        format!("{} shards", r.files.len())
    };
    writeln!(
        out,
        "{}: {} file ({shards}, {})",
        r.path,
        if r.kind == "logits" {
            "logit"
        } else {
            "log-probability"
        },
        size(total)
    )?;
    for (i, f) in r.files.iter().enumerate() {
        if i == SHARDS_SHOWN && r.files.len() > SHARDS_SHOWN + 1 {
            writeln!(
                out,
                "  ... {} more shards (all listed in --json)",
                r.files.len() - SHARDS_SHOWN
            )?;
            break;
        }
        if r.files.len() > 1 {
            writeln!(out, "  {}", f.path)?;
        }
        for t in &f.tensors {
            let shape = format!("{:?}", t.shape);
            writeln!(
                out,
                "    {:<16} {:<5} {:<22} {}",
                t.name,
                t.dtype,
                shape,
                size(t.bytes)
            )?;
        }
    }
    if !r.metadata.is_empty() {
        writeln!(out, "  metadata:")?;
        for (k, v) in &r.metadata {
            writeln!(out, "    {k:<22} {v:?}")?;
        }
    }
    if let Some(l) = &r.logits {
        let mask = match &l.mask {
            Some(m) => format!("mask: {} counted, {} padding", m.counted, m.padding),
            None => "no mask".into(),
        };
        writeln!(
            out,
            "  layout: {} rows x {} vocab, {}, {} prompts (grouping: {}), {}, {mask}",
            l.rows,
            l.vocab,
            l.dtype,
            l.prompts,
            l.grouping,
            if l.targets { "targets" } else { "no targets" }
        )?;
    }
    if let Some(v) = &r.values {
        writeln!(
            out,
            "  values ({} sampled rows): min {} max {} mean {}, -inf {:.3}%, mean row max {}, mean row log-sum-exp {} -> looks {}",
            v.rows_sampled,
            sci(v.min),
            sci(v.max),
            sci(v.mean),
            100.0 * v.neg_inf_fraction,
            sci(v.row_max_mean),
            sci(v.row_logsumexp_mean),
            v.looks
        )?;
    }
    if let Some(f) = &r.storage_floor {
        writeln!(
            out,
            "  storage floor ({}): {} nats per position, {}",
            f.dtype,
            sci(f.nats),
            f.basis
        )?;
        if let Some(c) = f.if_centered {
            writeln!(
                out,
                "    stored minus the row maximum at the same dtype: {} nats",
                sci(c)
            )?;
        }
    }
    if let Some(l) = &r.logprobs {
        writeln!(
            out,
            "  draws: {}, {} prompts (grouping: {}), skipped {}, infinite {}",
            l.draws, l.prompts, l.grouping, l.skipped, l.infinite
        )?;
        for (name, s) in [
            ("logprob_ref", &l.logprob_ref),
            ("logprob_cand", &l.logprob_cand),
        ] {
            writeln!(
                out,
                "    {name:<13} min {} max {} mean {}",
                sci(s.min),
                sci(s.max),
                sci(s.mean)
            )?;
        }
    }
    if r.notes.is_empty() {
        writeln!(out, "  notes: none")?;
    } else {
        writeln!(out, "  notes:")?;
        for n in &r.notes {
            writeln!(out, "    - {n}")?;
        }
    }
    Ok(())
}
