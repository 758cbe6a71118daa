//! Reports: one data model, built once from the engine's accumulators, and
//! one module per output format behind the small `Format` trait.

pub mod csv;
pub mod html;
pub mod json;
pub mod text;

use crate::engine::{
    self, CandidateAccum, EngineResult, PairAccum, SkippedRow, WorstPosition, KL, KL_REV, NMETRIC,
};
use crate::estimators::KSummary;
use crate::input::{LogitFile, StoredDtype};
use crate::stats::{cluster_mean, Aggregate};
use serde::Serialize;
use std::io::Write;

pub const SCHEMA: &str = "klgauge-report/1";

/// The sentence every report carries beside its verdict.
pub const DISCLAIMER: &str = "A passing gate is evidence that the candidate's next-token distribution stayed close to the reference's on these prompts; it is not a certificate that the model is safe or fit for its use. Keep your own evaluation and review before shipping.";

/// An output format (terminal text, JSON, HTML ...).
pub trait Format {
    fn write(&self, report: &Report, out: &mut dyn Write) -> std::io::Result<()>;
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub schema: &'static str,
    pub units: &'static str,
    pub tool: ToolInfo,
    pub reference: FileInfo,
    pub settings: Settings,
    pub candidates: Vec<CandidateReport>,
    /// Paired differences of mean kl between candidates (a minus b).
    pub comparisons: Vec<PairReport>,
    /// Candidates ordered by mean kl, lowest first.
    pub ranking: Vec<RankEntry>,
    pub timing: Timing,
    pub notice: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct ToolInfo {
    pub name: &'static str,
    pub version: &'static str,
}

impl ToolInfo {
    /// This build of klgauge.
    pub fn current() -> ToolInfo {
        ToolInfo {
            name: "klgauge",
            version: env!("CARGO_PKG_VERSION"),
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct FileInfo {
    pub path: String,
    pub dtype: &'static str,
    pub rows: u64,
    pub vocab: u64,
    pub prompts: u64,
    /// "sequences", "offsets" or "rows" (each row its own prompt).
    pub grouping: &'static str,
    pub model: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Settings {
    pub compared_vocab: u64,
    pub samples: Vec<usize>,
    pub seed: u64,
    pub top: usize,
    pub js: bool,
    pub shard: Option<String>,
    /// How p50 .. p999 were found: "exact" (sorted values), or from merged
    /// sketches of a sharded run, with their relative accuracy.
    pub percentiles: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Timing {
    pub exact_pass_seconds: f64,
    pub rows_per_second: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct TokenProb {
    pub id: u32,
    pub p: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub text: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WorstPositionReport {
    pub row: u64,
    pub prompt: u64,
    pub position: u64,
    pub kl: f64,
    pub target: Option<i64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub target_text: Option<String>,
    pub ref_top: Vec<TokenProb>,
    pub cand_top: Vec<TokenProb>,
    /// Text of up to 8 tokens before the position, oldest first (with a
    /// tokenizer and targets).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub context: Option<Vec<String>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WorstPromptReport {
    pub prompt: u64,
    pub positions: u64,
    pub kl_mean: f64,
    pub kl_max: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct EstimatorBlock {
    /// "forward" estimates KL(p||q) from x ~ p; "reverse" KL(q||p) from x ~ q.
    pub direction: &'static str,
    pub samples_per_position: usize,
    pub positions: u64,
    pub exact_mean: f64,
    pub k1: KSummary,
    pub k2: KSummary,
    pub k3: KSummary,
}

#[derive(Debug, Clone, Serialize)]
pub struct SamplingCost {
    /// Sampled logging keeps two log-probabilities (f32) per draw.
    pub sampled_bytes_per_position: Vec<(usize, u64)>,
    /// Full logits of both models at the stored precision.
    pub full_logit_bytes_per_position: u64,
    pub exact_pass_seconds: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Gate {
    pub name: String,
    pub limit: f64,
    pub value: f64,
    pub pass: bool,
    /// The limit lies inside the value's 95% interval: the verdict could flip
    /// with another prompt sample.
    pub uncertain: bool,
    /// The 95% interval of the value that `uncertain` was judged against.
    pub interval: Option<[f64; 2]>,
}

/// One finite bin of the kl histogram (edges in the report's units).
#[derive(Debug, Clone, Serialize)]
pub struct HistBin {
    pub lo: f64,
    pub hi: f64,
    pub count: u64,
}

/// The log-spaced histogram of per-position kl.
#[derive(Debug, Clone, Serialize)]
pub struct KlHistogramReport {
    pub bins_per_decade: usize,
    /// Positions with kl below `lowest_edge` (exact zeros included).
    pub below: u64,
    pub lowest_edge: f64,
    /// Positions with kl at or above `highest_edge` (infinite kl included).
    pub above: u64,
    pub highest_edge: f64,
    /// The bins that hold any position, in increasing order.
    pub bins: Vec<HistBin>,
}

/// kl over the positions whose index within the prompt lies in first..=last.
#[derive(Debug, Clone, Serialize)]
pub struct PositionBinReport {
    pub first: u64,
    pub last: u64,
    pub positions: u64,
    /// Mean over the finite values of the bin.
    pub kl_mean: f64,
    /// Approximate quantiles (from a histogram with 10 bins per decade).
    pub kl_p50: f64,
    pub kl_p90: f64,
    pub top1_agree: f64,
    pub infinite_kl: u64,
}

/// A place in the ranking by mean kl.
#[derive(Debug, Clone, Serialize)]
pub struct RankEntry {
    pub rank: usize,
    /// Index into `candidates`.
    pub candidate: usize,
    pub name: String,
    pub kl_mean: f64,
    pub kl_ci95: Option<[f64; 2]>,
    pub kl_p99: f64,
    pub top1_agree: f64,
    /// "pass", "fail" or "no gates".
    pub gates: &'static str,
    /// The paired difference to the next candidate in the ranking, in which
    /// this one is lower: "lower" when its 95% interval excludes zero,
    /// "not distinguishable" otherwise; null for the last place.
    pub vs_next: Option<&'static str>,
}

#[derive(Debug, Clone, Serialize)]
pub struct CandidateReport {
    /// The display name: the `model` metadata, else the file name.
    pub name: String,
    pub path: String,
    pub dtype: &'static str,
    pub model: Option<String>,
    pub positions: u64,
    pub kl: Aggregate,
    pub kl_reverse: Aggregate,
    pub tv: Aggregate,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub js: Option<Aggregate>,
    pub entropy_ref: Aggregate,
    pub entropy_cand: Aggregate,
    pub nll_ref: Option<Aggregate>,
    pub nll_cand: Option<Aggregate>,
    pub top1_agree: f64,
    pub ppl_ref: Option<f64>,
    pub ppl_cand: Option<f64>,
    pub ppl_ratio: Option<f64>,
    pub skipped_rows: u64,
    pub skipped: Vec<SkippedRow>,
    pub infinite_kl: u64,
    pub storage_floor: f64,
    /// Approximate 95% interval of kl.p99 (Woodruff's method, prompts as clusters).
    pub kl_p99_ci95: Option<[f64; 2]>,
    pub kl_histogram: KlHistogramReport,
    pub kl_by_position: Vec<PositionBinReport>,
    pub estimators: Vec<EstimatorBlock>,
    pub sampling_cost: SamplingCost,
    pub worst_positions: Vec<WorstPositionReport>,
    pub worst_prompts: Vec<WorstPromptReport>,
    pub gates: Vec<Gate>,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct PairReport {
    pub a: usize,
    pub b: usize,
    pub a_name: String,
    pub b_name: String,
    pub positions: u64,
    /// Mean of kl_a - kl_b over positions counted in both.
    pub kl_mean_diff: f64,
    pub ci95: Option<[f64; 2]>,
    /// "a lower", "b lower" or "not distinguishable" at 95%.
    pub verdict: &'static str,
}

/// Gate limits, in the report's units.
#[derive(Debug, Clone, Default)]
pub struct GateLimits {
    pub max_kl_mean: Option<f64>,
    pub max_kl_p99: Option<f64>,
    pub min_top1: Option<f64>,
}

pub struct BuildInputs<'a> {
    pub reference: &'a LogitFile,
    pub candidates: &'a [LogitFile],
    pub cols: usize,
    pub bits: bool,
    pub samples: Vec<usize>,
    pub seed: u64,
    pub top: usize,
    pub js: bool,
    pub shard: Option<String>,
    pub gates: GateLimits,
    pub vocabulary: Option<&'a crate::tokens::Vocabulary>,
    pub targets: Option<&'a [i64]>,
}

impl<'a> BuildInputs<'a> {
    pub fn settings(&self) -> ReportSettings<'a> {
        ReportSettings {
            cols: self.cols,
            bits: self.bits,
            samples: self.samples.clone(),
            seed: self.seed,
            top: self.top,
            js: self.js,
            shard: self.shard.clone(),
            percentiles: "exact".into(),
            gates: self.gates.clone(),
            vocabulary: self.vocabulary,
        }
    }
}

/// The settings a report shows and applies, with no input file at hand.
#[derive(Debug, Clone)]
pub struct ReportSettings<'a> {
    pub cols: usize,
    pub bits: bool,
    pub samples: Vec<usize>,
    pub seed: u64,
    pub top: usize,
    pub js: bool,
    pub shard: Option<String>,
    /// See `Settings::percentiles`.
    pub percentiles: String,
    pub gates: GateLimits,
    pub vocabulary: Option<&'a crate::tokens::Vocabulary>,
}

/// What a report says about an input file: read from the open file, or
/// from the identity a partial result carries (`merge` has no files).
#[derive(Debug, Clone, PartialEq)]
pub struct FileSummary {
    pub path: String,
    pub dtype: StoredDtype,
    pub rows: u64,
    pub vocab: u64,
    pub prompts: u64,
    /// "sequences", "offsets" or "rows".
    pub grouping: &'static str,
    pub model: Option<String>,
}

impl FileSummary {
    pub fn of(f: &LogitFile) -> FileSummary {
        FileSummary {
            path: f.path.display().to_string(),
            dtype: f.dtype,
            rows: f.rows as u64,
            vocab: f.vocab as u64,
            prompts: f.prompts() as u64,
            grouping: f.grouping.name(),
            model: f.metadata.get("model").cloned(),
        }
    }
}

/// A worst position with what needs the files already read.
#[derive(Debug, Clone, PartialEq)]
pub struct ResolvedWorst {
    pub at: WorstPosition,
    /// The five most likely tokens of each model, (id, probability).
    pub ref_top: Vec<(u32, f64)>,
    pub cand_top: Vec<(u32, f64)>,
    /// The tokens before the position (targets of the rows before it within
    /// the prompt, up to 8); None without targets.
    pub context: Option<Vec<i64>>,
}

/// The top tokens and context of each worst position of `acc`, in list
/// order: the tokens the pass took (`CandidateAccum::worst_tops`), else
/// read from the files, in parallel (each is a row read and normalised
/// twice).
pub fn resolve_worst(
    reference: &LogitFile,
    candidate: &LogitFile,
    cols: usize,
    targets: Option<&[i64]>,
    acc: &CandidateAccum,
) -> Vec<ResolvedWorst> {
    use rayon::prelude::*;
    // One run of positions per worker, each with one set of buffers
    // (`map_init` made a set for every piece rayon split off).
    let per = acc
        .worst
        .len()
        .div_ceil(rayon::current_num_threads().max(1))
        .max(1);
    acc.worst
        .par_chunks(per)
        .flat_map_iter(|run| {
            let mut buf = engine::TopBuf::default();
            run.iter().map(move |w| {
                let row = w.row as usize;
                let (ref_top, cand_top) = match acc.worst_tops.get(&w.row) {
                    Some(t) => (t.reference.clone(), t.candidate.clone()),
                    None => (
                        engine::top_tokens(reference, row, cols, engine::TOP_TOKENS, &mut buf),
                        engine::top_tokens(candidate, row, cols, engine::TOP_TOKENS, &mut buf),
                    ),
                };
                ResolvedWorst {
                    at: w.clone(),
                    ref_top,
                    cand_top,
                    context: context_ids(targets, row, w.position as usize),
                }
            })
        })
        .collect()
}

/// The input tokens before a position: the input token at row r is the
/// target of row r - 1 within the prompt; up to 8 of them.
pub fn context_ids(targets: Option<&[i64]>, row: usize, position: usize) -> Option<Vec<i64>> {
    let t = targets?;
    let first = row - position;
    let lo = (row + 1).saturating_sub(8).max(first + 1);
    Some(if lo <= row {
        t[lo - 1..row].to_vec()
    } else {
        Vec::new()
    })
}

/// One candidate's results with everything that needs the input files
/// already resolved: `build` reads them from the files, `merge` from the
/// partial results.
#[derive(Debug, Clone)]
pub struct CandidateSource<'a> {
    pub file: FileSummary,
    /// Positions, per-prompt sums, estimator sums, skips (its `values` and
    /// `worst` are not read here).
    pub acc: &'a CandidateAccum,
    /// One aggregate per metric slot, in nats.
    pub aggregates: Vec<Aggregate>,
    pub worst: Vec<ResolvedWorst>,
    /// In nats.
    pub storage_floor: f64,
    /// The 95% interval of kl's p99, in nats (see `p99_interval`).
    pub kl_p99_ci95: Option<[f64; 2]>,
}

/// Fewer counted positions than this and the report says the numbers are thin.
pub const FEW_POSITIONS: u64 = 1000;
/// Fewer prompts than this and the cluster interval itself is unreliable.
pub const FEW_PROMPTS: u64 = 30;

fn aggregate(acc: &mut CandidateAccum, metric: usize) -> Aggregate {
    let prompts = &acc.prompts;
    let groups = prompts
        .iter()
        .map(move |p| (p.count(metric), p.sum[metric]));
    Aggregate::exact(&mut acc.values[metric], groups)
}

pub fn build(inputs: &BuildInputs, mut result: EngineResult) -> Report {
    let r = inputs.reference;
    let aggregates: Vec<Vec<Aggregate>> = result
        .candidates
        .iter_mut()
        .map(|acc| (0..NMETRIC).map(|m| aggregate(acc, m)).collect())
        .collect();
    let mut cands = Vec::new();
    for ((k, acc), aggregates) in result.candidates.iter().enumerate().zip(aggregates) {
        let file = &inputs.candidates[k];
        let sorted = &acc.values[KL];
        let p99_ci = p99_interval(acc, aggregates[KL].p99, |q| {
            crate::stats::percentile(sorted, q)
        });
        cands.push(CandidateSource {
            file: FileSummary::of(file),
            acc,
            aggregates,
            worst: resolve_worst(r, file, inputs.cols, inputs.targets, acc),
            storage_floor: crate::floor::mean_floor(acc.floor_sum, acc.floor_rows),
            kl_p99_ci95: p99_ci,
        });
    }
    assemble(
        &inputs.settings(),
        &FileSummary::of(r),
        cands,
        &result.pairs,
        result.seconds,
        result.rows_processed,
    )
}

/// The report from resolved results; `build` and `merge` both end here.
pub fn assemble(
    settings: &ReportSettings,
    reference: &FileSummary,
    candidates: Vec<CandidateSource>,
    pairs: &[PairAccum],
    seconds: f64,
    rows_processed: u64,
) -> Report {
    let scale = if settings.bits {
        1.0 / std::f64::consts::LN_2
    } else {
        1.0
    };
    let cands: Vec<CandidateReport> = candidates
        .into_iter()
        .map(|c| candidate_report(settings, reference, c, scale, seconds))
        .collect();
    let mut comparisons: Vec<PairReport> = pairs.iter().map(|p| pair_report(p, scale)).collect();
    name_pairs(&mut comparisons, &cands);
    let ranking = ranking(&cands, &comparisons);
    let r = reference;
    Report {
        schema: SCHEMA,
        units: if settings.bits { "bits" } else { "nats" },
        tool: ToolInfo::current(),
        reference: FileInfo {
            path: r.path.clone(),
            dtype: r.dtype.name(),
            rows: r.rows,
            vocab: r.vocab,
            prompts: r.prompts,
            grouping: r.grouping,
            model: r.model.clone(),
        },
        settings: Settings {
            compared_vocab: settings.cols as u64,
            samples: settings.samples.clone(),
            seed: settings.seed,
            top: settings.top,
            js: settings.js,
            shard: settings.shard.clone(),
            percentiles: settings.percentiles.clone(),
        },
        candidates: cands,
        comparisons,
        ranking,
        timing: Timing {
            exact_pass_seconds: seconds,
            rows_per_second: if seconds > 0.0 {
                rows_processed as f64 / seconds
            } else {
                0.0
            },
        },
        notice: DISCLAIMER,
    }
}

pub fn pair_report(p: &PairAccum, scale: f64) -> PairReport {
    let (mean, ci) = cluster_mean(p.prompts.iter().map(|&(_, n, s)| (n, s)));
    let n: f64 = p.prompts.iter().map(|x| x.1).sum();
    let verdict = match ci {
        Some([lo, _]) if lo > 0.0 => "b lower",
        Some([_, hi]) if hi < 0.0 => "a lower",
        _ => "not distinguishable",
    };
    PairReport {
        a: p.a,
        b: p.b,
        a_name: String::new(),
        b_name: String::new(),
        positions: n as u64,
        kl_mean_diff: mean * scale,
        ci95: ci.map(|[a, b]| [a * scale, b * scale]),
        verdict,
    }
}

/// Fills the candidate names into the pair reports.
pub fn name_pairs(pairs: &mut [PairReport], cands: &[CandidateReport]) {
    for p in pairs {
        p.a_name = cands.get(p.a).map(|c| c.name.clone()).unwrap_or_default();
        p.b_name = cands.get(p.b).map(|c| c.name.clone()).unwrap_or_default();
    }
}

/// Candidates ordered by mean kl (lowest first; a NaN mean goes last, ties
/// keep the command-line order), each with the paired verdict against the
/// next one.
pub fn ranking(cands: &[CandidateReport], pairs: &[PairReport]) -> Vec<RankEntry> {
    let mut order: Vec<usize> = (0..cands.len()).collect();
    let key = |i: usize| {
        let m = cands[i].kl.mean;
        if m.is_nan() {
            f64::INFINITY
        } else {
            m
        }
    };
    order.sort_by(|&a, &b| key(a).total_cmp(&key(b)).then(a.cmp(&b)));
    order
        .iter()
        .enumerate()
        .map(|(rank, &i)| {
            let c = &cands[i];
            let vs_next = order.get(rank + 1).map(|&j| {
                let p = pairs.iter().find(|p| (p.a, p.b) == (i.min(j), i.max(j)));
                let lower = match p.map(|p| p.verdict) {
                    Some("a lower") => p.unwrap().a == i,
                    Some("b lower") => p.unwrap().b == i,
                    _ => false,
                };
                if lower {
                    "lower"
                } else {
                    "not distinguishable"
                }
            });
            RankEntry {
                rank: rank + 1,
                candidate: i,
                name: c.name.clone(),
                kl_mean: c.kl.mean,
                kl_ci95: c.kl.ci95,
                kl_p99: c.kl.p99,
                top1_agree: c.top1_agree,
                gates: if c.gates.is_empty() {
                    "no gates"
                } else if c.gates.iter().all(|g| g.pass) {
                    "pass"
                } else {
                    "fail"
                },
                vs_next,
            }
        })
        .collect()
}

/// The display name of a file: its `model` metadata, else its file name.
pub fn display_name(file: &FileSummary) -> String {
    match &file.model {
        Some(m) if !m.trim().is_empty() => m.trim().to_string(),
        _ => {
            let base = file
                .path
                .rsplit(['/', '\\'])
                .find(|s| !s.is_empty())
                .unwrap_or(&file.path);
            base.trim_end_matches(".safetensors").to_string()
        }
    }
}

/// The 95% interval of kl's p99 (`histo::quantile_interval`), from the
/// accumulated tail sums; `quantile` reads kl's quantile function (exact
/// values in a single run, the sketch after a merge).
pub fn p99_interval(
    acc: &CandidateAccum,
    p99: f64,
    quantile: impl Fn(f64) -> f64,
) -> Option<[f64; 2]> {
    let counted = acc.prompts.iter().filter(|p| p.n > 0.0);
    let n_sq: f64 = counted.clone().map(|p| p.n * p.n).sum();
    crate::histo::quantile_interval(
        &acc.kl_hist,
        &acc.kl_tail,
        n_sq,
        counted.count(),
        0.99,
        p99,
        quantile,
    )
}

fn histogram_report(h: &crate::histo::KlHistogram, scale: f64) -> KlHistogramReport {
    use crate::histo::{KL_HI_EXP, KL_LO_EXP, KL_PER_DECADE};
    KlHistogramReport {
        bins_per_decade: KL_PER_DECADE,
        below: h.below(),
        lowest_edge: 10f64.powi(KL_LO_EXP) * scale,
        above: h.above(),
        highest_edge: 10f64.powi(KL_HI_EXP) * scale,
        bins: h
            .bins()
            .filter(|b| b.2 > 0)
            .map(|(lo, hi, count)| HistBin {
                lo: lo * scale,
                hi: hi * scale,
                count,
            })
            .collect(),
    }
}

fn position_report(p: &crate::histo::PositionProfile, scale: f64) -> Vec<PositionBinReport> {
    p.bins
        .iter()
        .enumerate()
        .filter(|(_, b)| b.n > 0)
        .map(|(i, b)| {
            let (first, last) = crate::histo::position_range(i);
            PositionBinReport {
                first,
                last,
                positions: b.n,
                kl_mean: b.kl_mean() * scale,
                kl_p50: b.kl_quantile(0.5) * scale,
                kl_p90: b.kl_quantile(0.9) * scale,
                top1_agree: b.top1_sum / b.n as f64,
                infinite_kl: b.infinite,
            }
        })
        .collect()
}

fn candidate_report(
    settings: &ReportSettings,
    r: &FileSummary,
    c: CandidateSource,
    scale: f64,
    seconds: f64,
) -> CandidateReport {
    let CandidateSource {
        file,
        acc,
        aggregates: mut agg,
        worst,
        storage_floor: floor_nats,
        kl_p99_ci95,
    } = c;
    let p99_ci = kl_p99_ci95.map(|[a, b]| [a * scale, b * scale]);
    let n = acc.positions;
    let has_nll = agg[engine::NLL_REF].n > 0;
    let top1 = agg[engine::TOP1].mean;
    let (ppl_ref, ppl_cand) = if has_nll {
        (
            Some(agg[engine::NLL_REF].mean.exp()),
            Some(agg[engine::NLL_CAND].mean.exp()),
        )
    } else {
        (None, None)
    };
    let ppl_ratio = match (ppl_ref, ppl_cand) {
        (Some(a), Some(b)) => Some(b / a),
        _ => None,
    };
    // Unit conversion of everything measured in nats.
    for m in [
        engine::KL,
        engine::KL_REV,
        engine::JS,
        engine::ENT_REF,
        engine::ENT_CAND,
        engine::NLL_REF,
        engine::NLL_CAND,
    ] {
        agg[m] = agg[m].scaled(scale);
    }
    let floor = floor_nats * scale;

    let mut estimators = Vec::new();
    for (b, &ns) in settings.samples.iter().enumerate() {
        for (dir, name) in [(0usize, "forward"), (1, "reverse")] {
            let e = &acc.estimators[b][dir];
            if e.n == 0.0 {
                continue;
            }
            estimators.push(EstimatorBlock {
                direction: name,
                samples_per_position: ns,
                positions: e.n as u64,
                exact_mean: e.exact / e.n * scale,
                k1: e.summary(0, scale),
                k2: e.summary(1, scale),
                k3: e.summary(2, scale),
            });
        }
    }
    let sampling_cost = SamplingCost {
        sampled_bytes_per_position: settings
            .samples
            .iter()
            .map(|&s| (s, 8 * s as u64))
            .collect(),
        full_logit_bytes_per_position: (settings.cols * (r.dtype.size() + file.dtype.size()))
            as u64,
        exact_pass_seconds: seconds,
    };

    let vocab = settings.vocabulary;
    let tok = |&(id, p): &(u32, f64)| TokenProb {
        id,
        p,
        text: vocab.and_then(|v| v.text(id)),
    };
    let worst_positions = worst
        .iter()
        .map(|rw| {
            let w = &rw.at;
            WorstPositionReport {
                row: w.row,
                prompt: w.prompt,
                position: w.position,
                kl: w.kl * scale,
                target: w.target,
                target_text: match (vocab, w.target) {
                    (Some(v), Some(t)) => v.text(t as u32),
                    _ => None,
                },
                ref_top: rw.ref_top.iter().map(tok).collect(),
                cand_top: rw.cand_top.iter().map(tok).collect(),
                context: context_text(vocab, rw.context.as_deref()),
            }
        })
        .collect();
    let mut prompts: Vec<&engine::PromptSums> = acc.prompts.iter().filter(|p| p.n > 0.0).collect();
    prompts.sort_by(|a, b| {
        (b.sum[KL] / b.n)
            .total_cmp(&(a.sum[KL] / a.n))
            .then(a.prompt.cmp(&b.prompt))
    });
    let worst_prompts = prompts
        .iter()
        .take(settings.top)
        .map(|p| WorstPromptReport {
            prompt: p.prompt,
            positions: p.n as u64,
            kl_mean: p.sum[KL] / p.n * scale,
            kl_max: p.max_kl * scale,
        })
        .collect();

    let kl = agg[KL].clone();
    let gates = evaluate_gates(&settings.gates, &kl, p99_ci, top1, &acc.prompts);
    let warnings = warnings(settings, r, &file, acc, &kl, floor, n, has_nll);
    CandidateReport {
        name: display_name(&file),
        path: file.path.clone(),
        dtype: file.dtype.name(),
        model: file.model.clone(),
        positions: n,
        kl,
        kl_reverse: agg[KL_REV].clone(),
        tv: agg[engine::TV].clone(),
        js: if settings.js {
            Some(agg[engine::JS].clone())
        } else {
            None
        },
        entropy_ref: agg[engine::ENT_REF].clone(),
        entropy_cand: agg[engine::ENT_CAND].clone(),
        nll_ref: if has_nll {
            Some(agg[engine::NLL_REF].clone())
        } else {
            None
        },
        nll_cand: if has_nll {
            Some(agg[engine::NLL_CAND].clone())
        } else {
            None
        },
        top1_agree: top1,
        ppl_ref,
        ppl_cand,
        ppl_ratio,
        skipped_rows: acc.skipped_rows,
        skipped: acc.skipped.clone(),
        infinite_kl: acc.infinite_kl,
        storage_floor: floor,
        kl_p99_ci95: p99_ci,
        kl_histogram: histogram_report(&acc.kl_hist, scale),
        kl_by_position: position_report(&acc.by_position, scale),
        estimators,
        sampling_cost,
        worst_positions,
        worst_prompts,
        gates,
        warnings,
    }
}

/// The context tokens as text (with a tokenizer and targets).
fn context_text(v: Option<&crate::tokens::Vocabulary>, ids: Option<&[i64]>) -> Option<Vec<String>> {
    let (v, ids) = (v?, ids?);
    Some(
        ids.iter()
            .filter(|&&id| id >= 0)
            .map(|&id| v.text(id as u32).unwrap_or_else(|| format!("<{id}>")))
            .collect(),
    )
}

/// The gates asked for. `p99_ci` is the interval of kl.p99 (see
/// `quantile_interval`); a gate is `uncertain` when its limit lies inside the
/// interval of its value.
pub fn evaluate_gates(
    limits: &GateLimits,
    kl: &Aggregate,
    p99_ci: Option<[f64; 2]>,
    top1: f64,
    prompts: &[engine::PromptSums],
) -> Vec<Gate> {
    let mut g = Vec::new();
    let inside = |ci: Option<[f64; 2]>, x: f64| ci.is_some_and(|[a, b]| a <= x && x <= b);
    if let Some(x) = limits.max_kl_mean {
        let v = kl.mean;
        g.push(Gate {
            name: "max-kl-mean".into(),
            limit: x,
            value: v,
            pass: v <= x,
            uncertain: inside(kl.ci95, x),
            interval: kl.ci95,
        });
    }
    if let Some(x) = limits.max_kl_p99 {
        let v = kl.p99;
        g.push(Gate {
            name: "max-kl-p99".into(),
            limit: x,
            value: v,
            pass: v <= x,
            uncertain: inside(p99_ci, x),
            interval: p99_ci,
        });
    }
    if let Some(x) = limits.min_top1 {
        let (_, ci) = cluster_mean(prompts.iter().map(|p| (p.n, p.sum[engine::TOP1])));
        g.push(Gate {
            name: "min-top1".into(),
            limit: x,
            value: top1,
            pass: top1 >= x,
            uncertain: inside(ci, x),
            interval: ci,
        });
    }
    g
}

#[allow(clippy::too_many_arguments)]
fn warnings(
    settings: &ReportSettings,
    reference: &FileSummary,
    file: &FileSummary,
    acc: &CandidateAccum,
    kl: &Aggregate,
    floor: f64,
    n: u64,
    has_nll: bool,
) -> Vec<String> {
    let mut w = Vec::new();
    let units = if settings.bits { "bits" } else { "nats" };
    if n == 0 {
        w.push(
            "no position was counted: every row is masked or skipped, so there is nothing to judge"
                .into(),
        );
    } else if n < FEW_POSITIONS {
        w.push(format!("only {n} positions were counted: percentiles and intervals are rough; use more prompts before deciding"));
    }
    let prompts = acc.prompts.iter().filter(|p| p.n > 0.0).count() as u64;
    if reference.grouping == "rows" {
        w.push("no prompt grouping in the input (neither 3-D logits nor prompt_offsets): every row counts as its own prompt, so intervals ignore the correlation within a prompt and are too narrow".into());
    } else if prompts > 0 && prompts < FEW_PROMPTS {
        w.push(format!(
            "only {prompts} prompts: the 95% intervals rest on few clusters and are unreliable"
        ));
    }
    if acc.skipped_rows > 0 {
        w.push(format!("{} rows were skipped for invalid values (NaN, +inf or all -inf logits); they are listed under `skipped`", acc.skipped_rows));
    }
    if acc.infinite_kl > 0 {
        w.push(format!("{} positions have infinite kl: the candidate gives probability 0 to a token the reference allows; the mean is infinite", acc.infinite_kl));
    }
    if floor.is_finite() && kl.mean.is_finite() && kl.mean < 10.0 * floor {
        w.push(format!(
            "mean kl {:.3e} {units} is within 10x of the storage floor {:.3e} {units} ({} / {}): part of what is measured is rounding of the stored logits, not the model; store centered logits or a wider dtype",
            kl.mean,
            floor,
            reference.dtype.name(),
            file.dtype.name()
        ));
    }
    if !has_nll {
        w.push("no targets: perplexities are not available".into());
    }
    w
}
