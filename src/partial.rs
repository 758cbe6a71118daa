//! Partial results of sharded runs and their merge.
//!
//! `compare --shard I/N --partial FILE` processes one deterministic slice of
//! the prompts and writes everything a report needs that cannot be recomputed
//! without the logits: the exact sums behind every mean and interval, a
//! mergeable quantile sketch per metric, the worst positions with their top
//! tokens already read, skipped rows, infinite counts and the storage floor
//! inputs, plus the identity of the inputs and settings so that merging
//! pieces of different runs is refused. `merge` checks, combines and hands
//! the result to the same report builder a single run uses.
//!
//! The file format (JSON, `"schema": "klgauge-partial/1"`) is documented
//! field by field in docs/partial-format.md.

use crate::engine::{
    self, CandidateAccum, EngineResult, PairAccum, PromptSums, SkippedRow, WorstPosition, NMETRIC,
};
use crate::error::{Error, ErrorKind, Result};
use crate::estimators::EstimatorSums;
use crate::input::{LogitFile, StoredDtype};
use crate::report::{self, CandidateSource, FileSummary, ReportSettings, ResolvedWorst};
use crate::sketch::{Sketch, SketchParts, Store};
use crate::stats::{cluster_mean, Aggregate};
use serde::{Deserialize, Serialize};
use std::ops::Range;
use std::path::{Path, PathBuf};

pub const SCHEMA: &str = "klgauge-partial/1";

/// Metric names in the order of every per-metric array of the format (the
/// engine's metric slots).
pub const METRICS: [&str; NMETRIC] = [
    "kl",
    "kl_reverse",
    "tv",
    "js",
    "entropy_ref",
    "entropy_cand",
    "nll_ref",
    "nll_cand",
    "top1_agree",
];

/// A float that survives JSON: finite values are numbers (written in the
/// shortest form that reads back to the same bits), and +inf, -inf and NaN,
/// which JSON numbers cannot hold, are the strings "inf", "-inf" and "nan".
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Num(pub f64);

impl Serialize for Num {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        let x = self.0;
        if x.is_finite() {
            s.serialize_f64(x)
        } else if x.is_nan() {
            s.serialize_str("nan")
        } else if x > 0.0 {
            s.serialize_str("inf")
        } else {
            s.serialize_str("-inf")
        }
    }
}

impl<'de> Deserialize<'de> for Num {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> std::result::Result<Num, D::Error> {
        struct V;
        impl serde::de::Visitor<'_> for V {
            type Value = Num;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a number or one of \"inf\", \"-inf\", \"nan\"")
            }
            fn visit_f64<E>(self, v: f64) -> std::result::Result<Num, E> {
                Ok(Num(v))
            }
            fn visit_i64<E>(self, v: i64) -> std::result::Result<Num, E> {
                Ok(Num(v as f64))
            }
            fn visit_u64<E>(self, v: u64) -> std::result::Result<Num, E> {
                Ok(Num(v as f64))
            }
            fn visit_str<E: serde::de::Error>(self, v: &str) -> std::result::Result<Num, E> {
                match v {
                    "inf" => Ok(Num(f64::INFINITY)),
                    "-inf" => Ok(Num(f64::NEG_INFINITY)),
                    "nan" => Ok(Num(f64::NAN)),
                    _ => Err(E::invalid_value(serde::de::Unexpected::Str(v), &self)),
                }
            }
        }
        d.deserialize_any(V)
    }
}

fn nums<const K: usize>(a: &[f64; K]) -> [Num; K] {
    a.map(Num)
}

fn floats<const K: usize>(a: &[Num; K]) -> [f64; K] {
    a.map(|n| n.0)
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Partial {
    pub schema: String,
    pub tool: ToolRecord,
    pub shard: ShardRecord,
    pub settings: SettingsRecord,
    pub reference: InputRecord,
    pub metrics: Vec<String>,
    pub candidates: Vec<CandidateRecord>,
    pub pairs: Vec<PairRecord>,
    pub timing: TimingRecord,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ToolRecord {
    pub name: String,
    pub version: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShardRecord {
    pub index: usize,
    pub count: usize,
    /// Prompts [first, end) of this shard.
    pub prompts: [u64; 2],
    /// Rows [first, end) of this shard.
    pub rows: [u64; 2],
}

/// Settings that change the numbers; partials merge only when they agree.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SettingsRecord {
    pub compared_vocab: u64,
    /// `--vocab` as given (null when the whole vocabulary is compared).
    pub vocab: Option<u64>,
    /// Draws per position, sorted, without duplicates or zeros.
    pub samples: Vec<usize>,
    pub seed: u64,
    pub top: usize,
    pub js: bool,
    pub bits: bool,
    pub sketch_relative_accuracy: f64,
}

/// The identity of one input file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputRecord {
    pub path: String,
    pub dtype: String,
    pub rows: u64,
    pub vocab: u64,
    pub prompts: u64,
    pub grouping: String,
    pub shape: Vec<u64>,
    pub model: Option<String>,
    /// 16 hex digits; see `fingerprint`.
    pub fingerprint: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PromptRecord {
    pub prompt: u64,
    pub n: u64,
    pub n_target: u64,
    pub sum: [Num; NMETRIC],
    pub max_kl: Num,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SumsRecord {
    pub n: u64,
    pub exact: Num,
    pub sum: [Num; 3],
    pub sum_sq: [Num; 3],
    pub sum_err_sq: [Num; 3],
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EstimatorRecord {
    pub samples_per_position: usize,
    pub forward: SumsRecord,
    pub reverse: SumsRecord,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TokenRecord {
    pub id: u32,
    pub p: Num,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WorstRecord {
    pub row: u64,
    pub prompt: u64,
    pub position: u64,
    pub kl: Num,
    pub target: Option<i64>,
    pub ref_top: Vec<TokenRecord>,
    pub cand_top: Vec<TokenRecord>,
    pub context: Option<Vec<i64>>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StoreRecord {
    pub offset: i32,
    pub counts: Vec<u64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SketchRecord {
    pub relative_accuracy: f64,
    pub count: u64,
    pub zero: u64,
    pub pos_inf: u64,
    pub neg_inf: u64,
    pub min: Num,
    pub max: Num,
    pub positive: StoreRecord,
    pub negative: StoreRecord,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FloorRecord {
    pub sum: Num,
    pub rows: u64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CandidateRecord {
    pub input: InputRecord,
    pub positions: u64,
    pub infinite_kl: u64,
    pub skipped_rows: u64,
    pub skipped: Vec<SkippedRow>,
    pub prompts: Vec<PromptRecord>,
    pub sketches: Vec<SketchRecord>,
    pub estimators: Vec<EstimatorRecord>,
    pub worst_positions: Vec<WorstRecord>,
    pub storage_floor: FloorRecord,
    /// The binned kl of the plots (empty in partials written before them).
    #[serde(default)]
    pub kl_histogram: crate::histo::KlHistogram,
    #[serde(default)]
    pub kl_by_position: crate::histo::PositionProfile,
    #[serde(default)]
    pub kl_tail: crate::histo::TailSums,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PairPromptRecord {
    pub prompt: u64,
    pub n: u64,
    pub sum_diff: Num,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PairRecord {
    pub a: usize,
    pub b: usize,
    pub prompts: Vec<PairPromptRecord>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TimingRecord {
    pub exact_pass_seconds: f64,
    pub rows_processed: u64,
}

// ---------------------------------------------------------------------------
// Writing a partial result (the shard side).

/// The prompts and rows of shard `index` of `count`: prompts
/// [index*P/count, (index+1)*P/count), so a prompt is never split and the
/// shards cover every prompt exactly once.
pub fn shard_range(
    reference: &LogitFile,
    index: usize,
    count: usize,
) -> (Range<usize>, Range<usize>) {
    let p = reference.prompts() as u128;
    let lo = (index as u128 * p / count as u128) as usize;
    let hi = ((index as u128 + 1) * p / count as u128) as usize;
    (
        lo..hi,
        reference.prompt_starts[lo]..reference.prompt_starts[hi],
    )
}

/// FNV-1a, 64 bits (Fowler, Noll and Vo; common practice): a fast
/// non-cryptographic hash, enough to tell different inputs apart.
struct Fnv(u64);

impl Fnv {
    fn new() -> Fnv {
        Fnv(0xcbf2_9ce4_8422_2325)
    }
    fn bytes(&mut self, b: &[u8]) {
        for &x in b {
            self.0 ^= x as u64;
            self.0 = self.0.wrapping_mul(0x0000_0100_0000_01b3);
        }
    }
    fn u64(&mut self, v: u64) {
        self.bytes(&v.to_le_bytes());
    }
}

/// A fingerprint of one input file: dtype, shape, rows, vocabulary, prompt
/// boundaries, targets, mask, and the stored bytes of the sampled rows. Equal
/// files give equal fingerprints on every machine; a file with another
/// shape, token stream or logits almost surely does not.
pub fn fingerprint(f: &LogitFile) -> String {
    let mut h = Fnv::new();
    h.bytes(b"klgauge-input-1");
    h.bytes(f.dtype.name().as_bytes());
    h.u64(f.shape.len() as u64);
    for &d in &f.shape {
        h.u64(d as u64);
    }
    h.u64(f.rows as u64);
    h.u64(f.vocab as u64);
    h.u64(f.prompt_starts.len() as u64);
    for &s in &f.prompt_starts {
        h.u64(s as u64);
    }
    match &f.targets {
        Some(t) => {
            h.u64(1);
            for &v in t {
                h.u64(v as u64);
            }
        }
        None => h.u64(0),
    }
    match &f.mask {
        Some(m) => {
            h.u64(1);
            for &v in m {
                h.bytes(&[v as u8]);
            }
        }
        None => h.u64(0),
    }
    for row in crate::floor::sample_rows(f.rows) {
        h.bytes(f.row_bytes(row, f.vocab));
    }
    format!("{:016x}", h.0)
}

pub fn input_record(f: &LogitFile) -> InputRecord {
    InputRecord {
        path: f.path.display().to_string(),
        dtype: f.dtype.name().to_string(),
        rows: f.rows as u64,
        vocab: f.vocab as u64,
        prompts: f.prompts() as u64,
        grouping: f.grouping.name().to_string(),
        shape: f.shape.iter().map(|&d| d as u64).collect(),
        model: f.metadata.get("model").cloned(),
        fingerprint: fingerprint(f),
    }
}

fn sums_record(e: &EstimatorSums) -> SumsRecord {
    SumsRecord {
        n: e.n as u64,
        exact: Num(e.exact),
        sum: nums(&e.sum),
        sum_sq: nums(&e.sum_sq),
        sum_err_sq: nums(&e.sum_err_sq),
    }
}

fn sums_from(r: &SumsRecord) -> EstimatorSums {
    EstimatorSums {
        n: r.n as f64,
        exact: r.exact.0,
        sum: floats(&r.sum),
        sum_sq: floats(&r.sum_sq),
        sum_err_sq: floats(&r.sum_err_sq),
    }
}

pub fn sketch_record(s: &Sketch) -> SketchRecord {
    let p = s.parts();
    SketchRecord {
        relative_accuracy: p.relative_accuracy,
        count: p.count,
        zero: p.zero,
        pos_inf: p.pos_inf,
        neg_inf: p.neg_inf,
        min: Num(p.min),
        max: Num(p.max),
        positive: StoreRecord {
            offset: p.positive.offset,
            counts: p.positive.counts,
        },
        negative: StoreRecord {
            offset: p.negative.offset,
            counts: p.negative.counts,
        },
    }
}

pub fn sketch_from(r: &SketchRecord) -> std::result::Result<Sketch, String> {
    Sketch::from_parts(SketchParts {
        relative_accuracy: r.relative_accuracy,
        count: r.count,
        zero: r.zero,
        pos_inf: r.pos_inf,
        neg_inf: r.neg_inf,
        min: r.min.0,
        max: r.max.0,
        positive: Store {
            offset: r.positive.offset,
            counts: r.positive.counts.clone(),
        },
        negative: Store {
            offset: r.negative.offset,
            counts: r.negative.counts.clone(),
        },
    })
}

/// What a shard run knows besides the engine's result.
pub struct ShardRun<'a> {
    pub reference: &'a LogitFile,
    pub candidates: &'a [LogitFile],
    pub cols: usize,
    pub targets: Option<&'a [i64]>,
    pub settings: SettingsRecord,
    pub index: usize,
    pub count: usize,
}

/// The partial result of one shard from the engine's result on its rows.
pub fn from_run(run: &ShardRun, result: EngineResult) -> Partial {
    let (prompts, rows) = shard_range(run.reference, run.index, run.count);
    let mut candidates = Vec::new();
    for (k, acc) in result.candidates.iter().enumerate() {
        let file = &run.candidates[k];
        let sketches = acc
            .values
            .iter()
            .map(|vals| {
                let mut s = Sketch::new(run.settings.sketch_relative_accuracy);
                for &v in vals {
                    s.add(v);
                }
                sketch_record(&s)
            })
            .collect();
        let resolved = report::resolve_worst(run.reference, file, run.cols, run.targets, acc);
        let worst_positions = resolved
            .into_iter()
            .map(|rw| {
                let w = &rw.at;
                let toks = |v: &[(u32, f64)]| {
                    v.iter()
                        .map(|&(id, p)| TokenRecord { id, p: Num(p) })
                        .collect()
                };
                WorstRecord {
                    row: w.row,
                    prompt: w.prompt,
                    position: w.position,
                    kl: Num(w.kl),
                    target: w.target,
                    ref_top: toks(&rw.ref_top),
                    cand_top: toks(&rw.cand_top),
                    context: rw.context,
                }
            })
            .collect();
        candidates.push(CandidateRecord {
            input: input_record(file),
            positions: acc.positions,
            infinite_kl: acc.infinite_kl,
            skipped_rows: acc.skipped_rows,
            skipped: acc.skipped.clone(),
            prompts: acc
                .prompts
                .iter()
                .map(|p| PromptRecord {
                    prompt: p.prompt,
                    n: p.n as u64,
                    n_target: p.n_target as u64,
                    sum: nums(&p.sum),
                    max_kl: Num(p.max_kl),
                })
                .collect(),
            sketches,
            estimators: run
                .settings
                .samples
                .iter()
                .zip(&acc.estimators)
                .map(|(&s, e)| EstimatorRecord {
                    samples_per_position: s,
                    forward: sums_record(&e[0]),
                    reverse: sums_record(&e[1]),
                })
                .collect(),
            worst_positions,
            storage_floor: FloorRecord {
                sum: Num(acc.floor_sum),
                rows: acc.floor_rows,
            },
            kl_histogram: acc.kl_hist.clone(),
            kl_by_position: acc.by_position.clone(),
            kl_tail: acc.kl_tail.clone(),
        });
    }
    let pairs = result
        .pairs
        .iter()
        .map(|p| PairRecord {
            a: p.a,
            b: p.b,
            prompts: p
                .prompts
                .iter()
                .map(|&(prompt, n, s)| PairPromptRecord {
                    prompt,
                    n: n as u64,
                    sum_diff: Num(s),
                })
                .collect(),
        })
        .collect();
    Partial {
        schema: SCHEMA.into(),
        tool: ToolRecord {
            name: "klgauge".into(),
            version: env!("CARGO_PKG_VERSION").into(),
        },
        shard: ShardRecord {
            index: run.index,
            count: run.count,
            prompts: [prompts.start as u64, prompts.end as u64],
            rows: [rows.start as u64, rows.end as u64],
        },
        settings: run.settings.clone(),
        reference: input_record(run.reference),
        metrics: METRICS.iter().map(|s| s.to_string()).collect(),
        candidates,
        pairs,
        timing: TimingRecord {
            exact_pass_seconds: result.seconds,
            rows_processed: result.rows_processed,
        },
    }
}

/// Writes a partial result atomically (compact JSON and a final newline).
pub fn write(p: &Partial, dest: &Path) -> Result<()> {
    crate::output::write_atomic(dest, |w| {
        serde_json::to_writer(&mut *w, p).map_err(std::io::Error::other)?;
        w.write_all(b"\n")
    })
}

// ---------------------------------------------------------------------------
// Reading and merging (the merge side).

/// Reads one partial result and checks that it is well formed on its own.
pub fn read(path: &Path) -> Result<Partial> {
    let bytes = std::fs::read(path)
        .map_err(|e| Error::input(path, format!("cannot read partial result: {e}")))?;
    #[derive(Deserialize)]
    struct Probe {
        schema: Option<serde_json::Value>,
    }
    let probe: Probe = serde_json::from_slice(&bytes).map_err(|e| {
        Error::input(
            path,
            format!("is not a klgauge partial result (not a JSON object: {e})"),
        )
    })?;
    match probe.schema.as_ref().and_then(|s| s.as_str()) {
        Some(SCHEMA) => {}
        Some(other) if other.starts_with("klgauge-partial/") => {
            return Err(Error::input(path, format!("is a partial result in format {other}; this build of klgauge reads {SCHEMA}")))
        }
        Some(other) => return Err(Error::input(path, format!("is not a klgauge partial result (its schema is \"{other}\", expected \"{SCHEMA}\")"))),
        None => return Err(Error::input(path, format!("is not a klgauge partial result (no \"schema\": \"{SCHEMA}\")"))),
    }
    let p: Partial = serde_json::from_slice(&bytes)
        .map_err(|e| Error::input(path, format!("is a damaged partial result: {e}")))?;
    check_one(&p).map_err(|m| Error::input(path, format!("is a damaged partial result: {m}")))?;
    Ok(p)
}

/// Internal consistency of one partial result, so merging never indexes out
/// of bounds or silently mixes up metrics.
fn check_one(p: &Partial) -> std::result::Result<(), String> {
    if p.metrics != METRICS {
        return Err(format!("metrics {:?}, expected {:?}", p.metrics, METRICS));
    }
    let s = &p.shard;
    if s.count == 0 || s.index >= s.count {
        return Err(format!("shard {}/{} is not a valid I/N", s.index, s.count));
    }
    if !(s.prompts[0] <= s.prompts[1]
        && s.prompts[1] <= p.reference.prompts
        && s.rows[0] <= s.rows[1]
        && s.rows[1] <= p.reference.rows)
    {
        return Err(format!(
            "shard ranges prompts {:?} rows {:?} do not fit the reference's {} prompts, {} rows",
            s.prompts, s.rows, p.reference.prompts, p.reference.rows
        ));
    }
    let (np, i, n) = (
        p.reference.prompts as u128,
        s.index as u128,
        s.count as u128,
    );
    if s.prompts != [(i * np / n) as u64, ((i + 1) * np / n) as u64] {
        return Err(format!(
            "shard {}/{} covers prompts {:?}, not the split this build makes",
            s.index, s.count, s.prompts
        ));
    }
    if dtype_of(&p.reference.dtype).is_none() {
        return Err(format!(
            "reference dtype `{}` is unknown",
            p.reference.dtype
        ));
    }
    let a = p.settings.sketch_relative_accuracy;
    if !(a > 0.0 && a < 1.0) {
        return Err(format!("sketch relative accuracy {a} is outside (0, 1)"));
    }
    if p.candidates.is_empty() {
        return Err("no candidate".into());
    }
    let nc = p.candidates.len();
    for (k, c) in p.candidates.iter().enumerate() {
        let at = |m: String| format!("candidate {}: {m}", k + 1);
        if dtype_of(&c.input.dtype).is_none() {
            return Err(at(format!("dtype `{}` is unknown", c.input.dtype)));
        }
        if c.sketches.len() != NMETRIC {
            return Err(at(format!(
                "{} sketches, expected one per metric ({NMETRIC})",
                c.sketches.len()
            )));
        }
        for (m, sk) in c.sketches.iter().enumerate() {
            if sk.relative_accuracy != a {
                return Err(at(format!(
                    "the {} sketch has relative accuracy {}, the settings say {a}",
                    METRICS[m], sk.relative_accuracy
                )));
            }
            sketch_from(sk).map_err(|e| at(format!("{} sketch: {e}", METRICS[m])))?;
        }
        let ns: Vec<usize> = c
            .estimators
            .iter()
            .map(|e| e.samples_per_position)
            .collect();
        if ns != p.settings.samples {
            return Err(at(format!(
                "estimators for {ns:?} draws per position, the settings say {:?}",
                p.settings.samples
            )));
        }
        let mut last = None;
        for pr in &c.prompts {
            if pr.prompt < s.prompts[0]
                || pr.prompt >= s.prompts[1]
                || last.is_some_and(|l| pr.prompt <= l)
            {
                return Err(at(format!(
                    "prompt {} is out of order or outside the shard's prompts {:?}",
                    pr.prompt, s.prompts
                )));
            }
            last = Some(pr.prompt);
        }
        let counted: u64 = c.prompts.iter().map(|p| p.n).sum();
        if counted != c.positions || c.sketches[engine::KL].count > c.positions {
            return Err(at(format!(
                "{} positions, but its prompts count {counted} and its kl sketch {}",
                c.positions,
                c.sketches[engine::KL].count
            )));
        }
        let binned = c.kl_histogram.total();
        let by_pos: u64 = c.kl_by_position.bins.iter().map(|b| b.n).sum();
        if (binned != 0 && binned != c.positions) || (by_pos != 0 && by_pos != c.positions) {
            return Err(at(format!(
                "{} positions, but its kl histogram holds {binned} and its position bins {by_pos}",
                c.positions
            )));
        }
        let slots = crate::histo::KL_BINS + 2;
        let t = &c.kl_tail;
        if t.sq.len() != t.cross.len()
            || !(t.sq.is_empty() || t.sq.len() == slots)
            || (!t.sq.is_empty() && c.kl_histogram.counts.len() != slots)
        {
            return Err(at(format!(
                "kl_tail holds {} and {} sums, expected {slots} each, beside a kl histogram",
                t.sq.len(),
                t.cross.len()
            )));
        }
        if c.worst_positions.len() > p.settings.top {
            return Err(at(format!(
                "{} worst positions, more than top {}",
                c.worst_positions.len(),
                p.settings.top
            )));
        }
        if let Some(w) = c
            .worst_positions
            .iter()
            .find(|w| w.row < s.rows[0] || w.row >= s.rows[1])
        {
            return Err(at(format!(
                "worst position at row {} lies outside the shard's rows {:?}",
                w.row, s.rows
            )));
        }
    }
    let want: Vec<(usize, usize)> = (0..nc)
        .flat_map(|a| (a + 1..nc).map(move |b| (a, b)))
        .collect();
    let have: Vec<(usize, usize)> = p.pairs.iter().map(|x| (x.a, x.b)).collect();
    if have != want {
        return Err(format!(
            "paired differences for {have:?}, expected {want:?}"
        ));
    }
    Ok(())
}

fn dtype_of(name: &str) -> Option<StoredDtype> {
    [StoredDtype::F32, StoredDtype::F16, StoredDtype::BF16]
        .into_iter()
        .find(|d| d.name() == name)
}

fn grouping_static(name: &str) -> &'static str {
    match name {
        "sequences" => "sequences",
        "offsets" => "offsets",
        _ => "rows",
    }
}

fn summary_of(r: &InputRecord) -> FileSummary {
    FileSummary {
        path: r.path.clone(),
        dtype: dtype_of(&r.dtype).unwrap_or(StoredDtype::F32),
        rows: r.rows,
        vocab: r.vocab,
        prompts: r.prompts,
        grouping: grouping_static(&r.grouping),
        model: r.model.clone(),
    }
}

/// Why two input records are not the same input (None when they are).
/// Paths are not compared: a cluster may mount the same files elsewhere.
fn input_difference(a: &InputRecord, b: &InputRecord) -> Option<String> {
    if a.fingerprint != b.fingerprint
        || a.rows != b.rows
        || a.vocab != b.vocab
        || a.dtype != b.dtype
        || a.shape != b.shape
        || a.prompts != b.prompts
    {
        Some(format!(
            "{} ({}, shape {:?}, fingerprint {}) instead of {} ({}, shape {:?}, fingerprint {})",
            b.path, b.dtype, b.shape, b.fingerprint, a.path, a.dtype, a.shape, a.fingerprint
        ))
    } else {
        None
    }
}

/// Why partial `b` cannot be merged with partial `a` (None when it can).
fn run_difference(a: &Partial, b: &Partial) -> Option<String> {
    if a.tool.version != b.tool.version {
        return Some(format!(
            "it was written by klgauge {}, the others by {}",
            b.tool.version, a.tool.version
        ));
    }
    if a.shard.count != b.shard.count {
        return Some(format!(
            "it is one of {} shards, the others of {}",
            b.shard.count, a.shard.count
        ));
    }
    if a.settings != b.settings {
        return Some(format!(
            "its settings {} differ from the others' {}",
            settings_text(&b.settings),
            settings_text(&a.settings)
        ));
    }
    if let Some(d) = input_difference(&a.reference, &b.reference) {
        return Some(format!("its reference is {d}"));
    }
    if a.candidates.len() != b.candidates.len() {
        return Some(format!(
            "it has {} candidates, the others {}",
            b.candidates.len(),
            a.candidates.len()
        ));
    }
    for (k, (x, y)) in a.candidates.iter().zip(&b.candidates).enumerate() {
        if let Some(d) = input_difference(&x.input, &y.input) {
            return Some(format!("its candidate {} is {d}", k + 1));
        }
    }
    None
}

fn settings_text(s: &SettingsRecord) -> String {
    format!(
        "(vocab {}{}, samples {:?}, seed {}, top {}, js {}, bits {}, sketch accuracy {})",
        s.compared_vocab,
        if s.vocab.is_some() {
            " via --vocab"
        } else {
            ""
        },
        s.samples,
        s.seed,
        s.top,
        s.js,
        s.bits,
        s.sketch_relative_accuracy
    )
}

/// Partial results combined: what `report::assemble` needs.
pub struct Merged {
    pub reference: FileSummary,
    pub settings: SettingsRecord,
    pub shards: usize,
    pub candidates: Vec<MergedCandidate>,
    pub pairs: Vec<PairAccum>,
    pub seconds: f64,
    pub rows_processed: u64,
}

pub struct MergedCandidate {
    pub file: FileSummary,
    /// Sums as a single run over all shards would hold them (`values` empty).
    pub acc: CandidateAccum,
    pub sketches: Vec<Sketch>,
    /// All shards' worst positions, in report order (at most `top` in all).
    pub worst: Vec<ResolvedWorst>,
    pub floor_sum: f64,
    pub floor_rows: u64,
}

fn merge_error(message: String) -> Error {
    Error {
        kind: ErrorKind::Input,
        message,
    }
}

/// Checks that the partials are the shards 0..N of one run, each once, and
/// combines them in shard order.
pub fn merge(parts: Vec<(PathBuf, Partial)>) -> Result<Merged> {
    let Some((first_path, first)) = parts.first() else {
        return Err(Error::usage("merge needs at least one partial result"));
    };
    for (path, p) in &parts[1..] {
        if let Some(why) = run_difference(first, p) {
            return Err(Error::input(
                path,
                format!(
                    "is a partial result of a different run than {}: {why}",
                    first_path.display()
                ),
            ));
        }
    }
    let n = first.shard.count;
    let mut by_index: Vec<Option<usize>> = vec![None; n];
    for (i, (path, p)) in parts.iter().enumerate() {
        if let Some(j) = by_index[p.shard.index] {
            return Err(Error::input(
                path,
                format!(
                    "holds shard {}/{n}, which {} already holds",
                    p.shard.index,
                    parts[j].0.display()
                ),
            ));
        }
        by_index[p.shard.index] = Some(i);
    }
    let missing: Vec<String> = (0..n)
        .filter(|&i| by_index[i].is_none())
        .map(|i| format!("{i}/{n}"))
        .collect();
    if !missing.is_empty() {
        let given: Vec<String> = parts
            .iter()
            .map(|(path, p)| format!("{} = {}/{n}", path.display(), p.shard.index))
            .collect();
        return Err(merge_error(format!(
            "shard{} {} of this run {} missing: no partial result was given for {} (given: {})",
            if missing.len() > 1 { "s" } else { "" },
            missing.join(", "),
            if missing.len() > 1 { "are" } else { "is" },
            if missing.len() > 1 { "them" } else { "it" },
            given.join(", ")
        )));
    }
    let ordered: Vec<&Partial> = by_index.iter().map(|i| &parts[i.unwrap()].1).collect();
    let settings = first.settings.clone();
    let nc = first.candidates.len();
    let mut candidates = Vec::with_capacity(nc);
    for k in 0..nc {
        let mut acc = CandidateAccum {
            values: vec![Vec::new(); NMETRIC],
            estimators: vec![Default::default(); settings.samples.len()],
            ..Default::default()
        };
        let mut sketches: Vec<Sketch> = (0..NMETRIC)
            .map(|_| Sketch::new(settings.sketch_relative_accuracy))
            .collect();
        let mut worst = Vec::new();
        let (mut floor_sum, mut floor_rows) = (0f64, 0u64);
        for p in &ordered {
            let c = &p.candidates[k];
            acc.positions += c.positions;
            acc.infinite_kl += c.infinite_kl;
            acc.skipped_rows += c.skipped_rows;
            for s in &c.skipped {
                if acc.skipped.len() < engine::SKIPPED_LISTED {
                    acc.skipped.push(s.clone());
                }
            }
            acc.prompts.extend(c.prompts.iter().map(|r| PromptSums {
                prompt: r.prompt,
                n: r.n as f64,
                n_target: r.n_target as f64,
                sum: floats(&r.sum),
                max_kl: r.max_kl.0,
            }));
            for (m, s) in c.sketches.iter().enumerate() {
                // Checked by `read`: same accuracy, valid parts.
                let s = sketch_from(s).map_err(merge_error)?;
                sketches[m].merge(&s).map_err(merge_error)?;
            }
            for (b, e) in c.estimators.iter().enumerate() {
                acc.estimators[b][0].merge(&sums_from(&e.forward));
                acc.estimators[b][1].merge(&sums_from(&e.reverse));
            }
            worst.extend(c.worst_positions.iter().map(|w| {
                let toks = |v: &[TokenRecord]| v.iter().map(|t| (t.id, t.p.0)).collect();
                ResolvedWorst {
                    at: WorstPosition {
                        row: w.row,
                        prompt: w.prompt,
                        position: w.position,
                        kl: w.kl.0,
                        target: w.target,
                    },
                    ref_top: toks(&w.ref_top),
                    cand_top: toks(&w.cand_top),
                    context: w.context.clone(),
                }
            }));
            floor_sum += c.storage_floor.sum.0;
            floor_rows += c.storage_floor.rows;
            acc.kl_hist.merge(&c.kl_histogram);
            acc.by_position.merge(&c.kl_by_position);
            acc.kl_tail.merge(&c.kl_tail);
        }
        // Every shard kept its own `top` worst, so the union holds the global ones.
        worst.sort_by(|a, b| engine::worst_order(&a.at, &b.at));
        worst.truncate(settings.top);
        acc.worst = worst.iter().map(|w| w.at.clone()).collect();
        candidates.push(MergedCandidate {
            file: summary_of(&first.candidates[k].input),
            acc,
            sketches,
            worst,
            floor_sum,
            floor_rows,
        });
    }
    let pairs = first
        .pairs
        .iter()
        .enumerate()
        .map(|(j, pr)| PairAccum {
            a: pr.a,
            b: pr.b,
            prompts: ordered
                .iter()
                .flat_map(|p| {
                    p.pairs[j]
                        .prompts
                        .iter()
                        .map(|x| (x.prompt, x.n as f64, x.sum_diff.0))
                })
                .collect(),
        })
        .collect();
    Ok(Merged {
        reference: summary_of(&first.reference),
        settings,
        shards: n,
        candidates,
        pairs,
        seconds: ordered.iter().map(|p| p.timing.exact_pass_seconds).sum(),
        rows_processed: ordered.iter().map(|p| p.timing.rows_processed).sum(),
    })
}

/// The aggregate SPEC defines, with percentiles from the sketch (within its
/// relative accuracy) and the mean, interval, count and maximum exact.
pub fn sketch_aggregate(s: &Sketch, groups: impl Iterator<Item = (f64, f64)> + Clone) -> Aggregate {
    let (mean, ci95) = cluster_mean(groups);
    Aggregate {
        n: s.count(),
        mean,
        ci95,
        p50: s.quantile(0.5),
        p90: s.quantile(0.9),
        p99: s.quantile(0.99),
        p999: s.quantile(0.999),
        max: s.max(),
    }
}

/// The report of merged partials, through the builder a single run uses.
/// `top` may lower the partials' own; `bits` adds to theirs.
pub fn report(
    m: &Merged,
    top: usize,
    bits: bool,
    gates: report::GateLimits,
    vocabulary: Option<&crate::tokens::Vocabulary>,
) -> report::Report {
    let settings = ReportSettings {
        cols: m.settings.compared_vocab as usize,
        bits: bits || m.settings.bits,
        samples: m.settings.samples.clone(),
        seed: m.settings.seed,
        top,
        js: m.settings.js,
        shard: Some(format!(
            "merged from {} shard{}",
            m.shards,
            if m.shards == 1 { "" } else { "s" }
        )),
        percentiles: format!(
            "sketch: within {} (relative) of the exact value",
            m.settings.sketch_relative_accuracy
        ),
        gates,
        vocabulary,
    };
    let sources = m
        .candidates
        .iter()
        .map(|c| {
            let aggregates: Vec<Aggregate> = (0..NMETRIC)
                .map(|metric| {
                    sketch_aggregate(
                        &c.sketches[metric],
                        c.acc
                            .prompts
                            .iter()
                            .map(move |p| (p.count(metric), p.sum[metric])),
                    )
                })
                .collect();
            let p99_ci = report::p99_interval(&c.acc, aggregates[engine::KL].p99, |q| {
                c.sketches[engine::KL].quantile(q)
            });
            CandidateSource {
                file: c.file.clone(),
                acc: &c.acc,
                aggregates,
                worst: c.worst.iter().take(top).cloned().collect(),
                storage_floor: crate::floor::mean_floor(c.floor_sum, c.floor_rows),
                kl_p99_ci95: p99_ci,
            }
        })
        .collect();
    let mut r = report::assemble(
        &settings,
        &m.reference,
        sources,
        &m.pairs,
        m.seconds,
        m.rows_processed,
    );
    let a = m.settings.sketch_relative_accuracy;
    for c in r.candidates.iter_mut() {
        for g in c.gates.iter().filter(|g| g.name == "max-kl-p99") {
            if (g.value - g.limit).abs() <= a * g.value.abs() {
                c.warnings.push(format!(
                    "the max-kl-p99 limit {:.4e} lies within the sketch's accuracy ({a}) of the merged p99 {:.4e}: the exact p99 may fall on the other side of it; a run without shards decides",
                    g.limit, g.value
                ));
            }
        }
    }
    r
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn num_round_trips_every_float_exactly() {
        // serde_json with float_roundtrip reads back the shortest representation
        // exactly; the non-finite values use the strings of the format.
        let mut xs = vec![
            0.0,
            -0.0,
            1.0 / 3.0,
            1e-310,
            f64::MAX,
            f64::MIN_POSITIVE,
            f64::INFINITY,
            f64::NEG_INFINITY,
            0.1 + 0.2,
        ];
        let mut z = 12345u64;
        for _ in 0..2000 {
            z = crate::estimators::mix64(z);
            let x = f64::from_bits(z);
            if x.is_finite() {
                xs.push(x);
            }
        }
        let text = serde_json::to_string(&xs.iter().map(|&x| Num(x)).collect::<Vec<_>>()).unwrap();
        let back: Vec<Num> = serde_json::from_str(&text).unwrap();
        for (a, b) in xs.iter().zip(&back) {
            assert_eq!(a.to_bits(), b.0.to_bits(), "{a:e} came back as {:e}", b.0);
        }
        let nan: Num = serde_json::from_str("\"nan\"").unwrap();
        assert!(nan.0.is_nan());
        assert!(serde_json::from_str::<Num>("\"infinity\"").is_err());
    }
}
