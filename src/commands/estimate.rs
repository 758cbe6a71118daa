//! `klgauge estimate FILE`: the sampled estimators alone, from a file of
//! per-token log-probabilities (see `input::logprobs` for the layout), for
//! when full logits were never kept.
//!
//! Every draw i holds log p(x_i) and log q(x_i) at a token x_i drawn from the
//! reference p. With log r = log q(x) - log p(x) the three estimators of
//! KL(p||q) are averaged over the draws (SPEC, "Sampled estimators"):
//! k1 = -log r, k2 = (log r)^2 / 2, k3 = (r - 1) - log r. There is no exact
//! value to set them beside, so each mean comes with a 95% interval that
//! treats prompts as clusters (`stats::cluster_mean`, the interval `compare`
//! uses), and a consistency check: per draw k1 - k3 = 1 - r, whose
//! expectation under x ~ p is 1 - sum_x q(x) = 0, so k1 and k3 estimate the
//! same number and their paired difference must be compatible with 0. When it
//! is not, the draws are too few for two models this far apart (r has a heavy
//! tail) or the tokens were not drawn from p itself (greedy decoding, top-k,
//! top-p or a temperature), and the report warns.
//!
//! # JSON output, schema `klgauge-estimate/1`
//!
//! ```text
//! {
//!   "schema": "klgauge-estimate/1",
//!   "units": "nats" | "bits",
//!   "tool": {"name", "version"},
//!   "file": {"path", "draws", "counted", "prompts",
//!            "grouping": "offsets" | "rows",
//!            "model": string | null,       // metadata `model`, else `model_cand`
//!            "model_ref": string | null},  // metadata `model_ref`
//!   "direction": "forward",         // KL(p||q), tokens drawn from the reference
//!   "k1" | "k2" | "k3": {
//!     "mean",                        // mean over counted draws
//!     "ci95": [lo, hi] | null,       // cluster-robust, prompts as clusters
//!     "std",                         // per-draw standard deviation
//!     "draws_for_10pct"              // draws for a 95% interval of +-10% of
//!   },                               //   this mean, at this file's clustering
//!   "k1_minus_k3": {"mean", "ci95", "agree"},  // agree: ci95 holds 0
//!   "skipped": n, "skipped_draws": [{"index", "prompt", "position", "fault"}],
//!   "infinite": n,                   // draws with logprob_cand = -inf
//!   "warnings": [string],
//!   "notice": string
//! }
//! ```
//!
//! Non-finite numbers are written as `null` (a mean is infinite when some
//! candidate log-probability is -inf; `infinite` counts those draws).
//! `index`, `prompt` and `position` count from 0.

use crate::error::Result;
use crate::input::{Grouping, LogprobFile};
use crate::output::write_atomic;
use crate::report::ToolInfo;
use crate::stats::cluster_mean;
use serde::Serialize;
use std::io::Write;
use std::path::PathBuf;

pub const SCHEMA: &str = "klgauge-estimate/1";

/// Most skipped draws listed individually; the count is always exact.
pub const SKIPPED_LISTED: usize = 1000;

/// Fewer counted draws than this and the report says the numbers are thin.
pub const FEW_DRAWS: u64 = 1000;
/// Fewer prompts than this and the cluster interval itself is unreliable.
pub const FEW_PROMPTS: u64 = 30;

pub const NOTICE: &str = "Sampled estimates of how far the candidate's next-token distribution moved from the reference's on these prompts; they are evidence about distribution drift, not a certificate that the model is safe or fit for its use.";

#[derive(Debug, Clone, Default)]
pub struct EstimateArgs {
    pub file: PathBuf,
    pub json: Option<PathBuf>,
    pub bits: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct EstimateFileInfo {
    pub path: String,
    pub draws: u64,
    pub counted: u64,
    pub prompts: u64,
    pub grouping: &'static str,
    /// Metadata `model` (or `model_cand`), and `model_ref`.
    pub model: Option<String>,
    pub model_ref: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct KEstimate {
    pub mean: f64,
    pub ci95: Option<[f64; 2]>,
    pub std: f64,
    pub draws_for_10pct: Option<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Consistency {
    pub mean: f64,
    pub ci95: Option<[f64; 2]>,
    /// The interval holds 0 (or there is no interval to judge by).
    pub agree: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct SkippedDraw {
    pub index: u64,
    pub prompt: u64,
    pub position: u64,
    pub fault: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct EstimateReport {
    pub schema: &'static str,
    pub units: &'static str,
    pub tool: ToolInfo,
    pub file: EstimateFileInfo,
    pub direction: &'static str,
    pub k1: KEstimate,
    pub k2: KEstimate,
    pub k3: KEstimate,
    pub k1_minus_k3: Consistency,
    pub skipped: u64,
    pub skipped_draws: Vec<SkippedDraw>,
    pub infinite: u64,
    pub warnings: Vec<String>,
    pub notice: &'static str,
}

/// Per-draw standard deviation by Welford's update (common practice).
#[derive(Debug, Clone, Copy, Default)]
struct Welford {
    n: f64,
    mean: f64,
    m2: f64,
}

impl Welford {
    fn add(&mut self, x: f64) {
        self.n += 1.0;
        let d = x - self.mean;
        self.mean += d / self.n;
        self.m2 += d * (x - self.mean);
    }
    fn std(&self) -> f64 {
        if self.n < 2.0 {
            f64::NAN
        } else {
            (self.m2 / (self.n - 1.0)).sqrt()
        }
    }
}

/// Per-prompt sums of k1, k2, k3 and k1 - k3.
#[derive(Debug, Clone, Copy, Default)]
struct PromptSum {
    n: f64,
    s: [f64; 4],
}

fn k_estimate(groups: &[PromptSum], k: usize, w: &Welford, infinite: u64, scale: f64) -> KEstimate {
    if infinite > 0 {
        return KEstimate {
            mean: f64::INFINITY,
            ci95: None,
            std: f64::NAN,
            draws_for_10pct: None,
        };
    }
    let (mean, ci) = cluster_mean(groups.iter().map(|g| (g.n, g.s[k])));
    let n: f64 = groups.iter().map(|g| g.n).sum();
    // The half-width shrinks as 1/sqrt(draws) when prompts of the same make-up
    // are added, so the draws needed for a half-width of 10% of the mean are
    // n * (h / (0.1 |mean|))^2.
    let need = ci.and_then(|[lo, hi]| {
        let h = 0.5 * (hi - lo);
        let rel = 0.1 * mean.abs();
        (rel > 0.0).then(|| (n * (h / rel).powi(2)).ceil().max(1.0))
    });
    KEstimate {
        mean: mean * scale,
        ci95: ci.map(|[a, b]| [a * scale, b * scale]),
        std: w.std() * scale,
        draws_for_10pct: need,
    }
}

/// Computes the report; writes nothing.
pub fn build(f: &LogprobFile, bits: bool) -> EstimateReport {
    let scale = if bits {
        1.0 / std::f64::consts::LN_2
    } else {
        1.0
    };
    let mut groups = Vec::with_capacity(f.prompts());
    let mut w = [Welford::default(); 3];
    let (mut skipped, mut infinite) = (0u64, 0u64);
    let mut listed = Vec::new();
    for (p, win) in f.prompt_starts.windows(2).enumerate() {
        let mut g = PromptSum::default();
        for i in win[0]..win[1] {
            let lr = match f.log_ratio(i) {
                Ok(v) => v,
                Err(fault) => {
                    skipped += 1;
                    if listed.len() < SKIPPED_LISTED {
                        listed.push(SkippedDraw {
                            index: i as u64,
                            prompt: p as u64,
                            position: (i - win[0]) as u64,
                            fault: fault.describe(),
                        });
                    }
                    continue;
                }
            };
            let k = crate::estimators::k_values(lr);
            if lr == f64::NEG_INFINITY {
                infinite += 1;
            } else {
                for j in 0..3 {
                    w[j].add(k[j]);
                }
            }
            g.n += 1.0;
            g.s[0] += k[0];
            g.s[1] += k[1];
            g.s[2] += k[2];
            // k1 - k3 = 1 - r, exactly and without cancellation.
            g.s[3] += -lr.exp_m1();
        }
        groups.push(g);
    }
    let counted: u64 = groups.iter().map(|g| g.n as u64).sum();
    let k1 = k_estimate(&groups, 0, &w[0], infinite, scale);
    let k2 = k_estimate(&groups, 1, &w[1], infinite, scale);
    let k3 = k_estimate(&groups, 2, &w[2], infinite, scale);
    // 1 - r is finite at every draw (it is 1 where q is 0).
    let (dm, dci) = cluster_mean(groups.iter().map(|g| (g.n, g.s[3])));
    let agree = dci.is_none_or(|[a, b]| a <= 0.0 && 0.0 <= b);
    let diff = Consistency {
        mean: dm * scale,
        ci95: dci.map(|[a, b]| [a * scale, b * scale]),
        agree,
    };
    let prompts = groups.iter().filter(|g| g.n > 0.0).count() as u64;

    let units = if bits { "bits" } else { "nats" };
    let mut warnings = Vec::new();
    if counted == 0 {
        warnings.push(
            "no draw could be used: every one is faulty, so there is nothing to estimate"
                .to_string(),
        );
    } else if counted < FEW_DRAWS {
        warnings.push(format!("only {counted} draws were counted: the estimates and their intervals are rough; log more positions before deciding"));
    }
    match f.grouping {
        Grouping::PerRow => warnings.push(
            "no prompt grouping in the input (no `prompt_offsets`): every draw counts as its own prompt, so the intervals ignore the correlation between draws of one prompt and are too narrow".into(),
        ),
        _ if prompts > 0 && prompts < FEW_PROMPTS => {
            warnings.push(format!("only {prompts} prompts: the 95% intervals rest on few clusters and are unreliable"))
        }
        _ => {}
    }
    if skipped > 0 {
        warnings.push(format!("{skipped} draws were skipped for invalid values (NaN, +inf, or a reference log-probability of -inf); they are listed under `skipped_draws`"));
    }
    if infinite > 0 {
        warnings.push(format!(
            "{infinite} draws have a candidate log-probability of -inf: the candidate gives probability 0 to a token the reference produced, so KL(p||q) is infinite and so are the k1 and k3 means"
        ));
    }
    let disjoint = match (k1.ci95, k3.ci95) {
        (Some([a1, b1]), Some([a3, b3])) => b1 < a3 || b3 < a1,
        _ => false,
    };
    if infinite == 0 && counted > 0 && (!agree || disjoint) {
        let ci = |c: Option<[f64; 2]>| {
            c.map_or("none".to_string(), |[a, b]| format!("{a:.3e} .. {b:.3e}"))
        };
        warnings.push(format!(
            "k1 ({:.3e} {units}) and k3 ({:.3e} {units}) disagree beyond their intervals: per draw k1 - k3 = 1 - r, whose mean must be 0 for tokens drawn from the reference, and its 95% interval is {}. Either the sample is too small for models this far apart (r has a heavy tail), or the tokens were not drawn from the reference's own distribution (greedy decoding, top-k, top-p or a temperature bias them); trust neither estimate until this is resolved",
            k1.mean,
            k3.mean,
            ci(diff.ci95)
        ));
    }
    if infinite == 0 && counted > 0 && k1.mean < 0.0 {
        warnings.push(format!(
            "k1's mean is negative ({:.3e} {units}) while KL is not: the draws are too few for k1's variance; read k3",
            k1.mean
        ));
    }
    EstimateReport {
        schema: SCHEMA,
        units,
        tool: ToolInfo::current(),
        file: EstimateFileInfo {
            path: f.path.display().to_string(),
            draws: f.n as u64,
            counted,
            prompts,
            grouping: f.grouping.name(),
            model: f
                .metadata
                .get("model")
                .or_else(|| f.metadata.get("model_cand"))
                .cloned(),
            model_ref: f.metadata.get("model_ref").cloned(),
        },
        direction: "forward",
        k1,
        k2,
        k3,
        k1_minus_k3: diff,
        skipped,
        skipped_draws: listed,
        infinite,
        warnings,
        notice: NOTICE,
    }
}

/// Validates the file, computes, and writes `--json` if asked.
pub fn estimate(args: &EstimateArgs) -> Result<EstimateReport> {
    let f = LogprobFile::open(&args.file)?;
    let report = build(&f, args.bits);
    if let Some(p) = &args.json {
        write_atomic(p, |w| {
            serde_json::to_writer_pretty(&mut *w, &report)?;
            w.write_all(b"\n")
        })?;
    }
    Ok(report)
}

use crate::report::text::sci;

/// The terminal summary.
pub fn write_text(r: &EstimateReport, out: &mut dyn Write) -> std::io::Result<()> {
    let m = match (&r.file.model_ref, &r.file.model) {
        (Some(a), Some(b)) => format!("  \"{b}\" against \"{a}\""),
        (None, Some(b)) => format!("  \"{b}\""),
        (Some(a), None) => format!("  reference \"{a}\""),
        (None, None) => String::new(),
    };
    writeln!(out, "log-probabilities: {}{m}", r.file.path)?;
    writeln!(
        out,
        "  draws {} (counted {}, skipped {}), {} prompts ({})",
        r.file.draws,
        r.file.counted,
        r.skipped,
        r.file.prompts,
        if r.file.grouping == "offsets" {
            "from prompt_offsets"
        } else {
            "no grouping: one per draw"
        }
    )?;
    writeln!(
        out,
        "  sampled estimates of KL(p||q), tokens drawn from the reference p, in {}",
        r.units
    )?;
    writeln!(
        out,
        "    {:<8} {:>10}   {:<25} {:>10}   draws for +-10%",
        "", "mean", "95% interval", "std/draw"
    )?;
    for (name, k, note) in [
        ("k1", &r.k1, ""),
        ("k2", &r.k2, "  (biased)"),
        ("k3", &r.k3, ""),
    ] {
        let ci = k.ci95.map_or("-".to_string(), |[a, b]| {
            format!("{} .. {}", sci(a), sci(b))
        });
        let need = k
            .draws_for_10pct
            .map_or("-".to_string(), |n| format!("{n:.0}"));
        writeln!(
            out,
            "    {name:<8} {:>10}   {ci:<25} {:>10}   {need}{note}",
            sci(k.mean),
            sci(k.std)
        )?;
    }
    let d = &r.k1_minus_k3;
    let ci = d.ci95.map_or("-".to_string(), |[a, b]| {
        format!("{} .. {}", sci(a), sci(b))
    });
    writeln!(
        out,
        "    {:<8} {:>10}   {ci:<25}   {}",
        "k1 - k3",
        sci(d.mean),
        if d.agree {
            "consistent with 0"
        } else {
            "NOT consistent with 0"
        }
    )?;
    if r.infinite > 0 {
        writeln!(
            out,
            "  infinite draws (logprob_cand = -inf): {}",
            r.infinite
        )?;
    }
    for w in &r.warnings {
        writeln!(out, "  warning: {w}")?;
    }
    writeln!(out, "note: {}", r.notice)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn welford_matches_two_pass() {
        // Two-pass sample variance of 1, 2, 4, 7: mean 3.5, var 7 (by hand).
        let mut w = Welford::default();
        for x in [1.0, 2.0, 4.0, 7.0] {
            w.add(x);
        }
        assert!((w.std() - 7f64.sqrt()).abs() < 1e-12);
    }
}
