//! The terminal summary: a short aligned table per candidate.

use super::{CandidateReport, Format, Report, TokenProb, WorstPositionReport};
use crate::stats::Aggregate;
use std::io::Write;

pub struct Text;

/// A number for a terminal table: 3 significant digits, `-` when missing.
pub fn sci(v: f64) -> String {
    if v.is_nan() {
        "-".into()
    } else if v.is_infinite() {
        if v > 0.0 {
            "inf".into()
        } else {
            "-inf".into()
        }
    } else if v == 0.0 {
        "0".into()
    } else {
        format!("{v:.3e}")
    }
}

fn interval(a: &Aggregate) -> String {
    match a.ci95 {
        Some([lo, hi]) => format!("95% interval {} .. {}", sci(lo), sci(hi)),
        None => "no interval".into(),
    }
}

fn row(out: &mut dyn Write, label: &str, value: String) -> std::io::Result<()> {
    writeln!(out, "  {label:<22} {value}")
}

/// Worst positions and prompts printed in the terminal; the files list `--top`.
const TERMINAL_ROWS: usize = 8;

/// A token for the terminal: its text in quotes, or its id.
fn token(id: u32, text: Option<&str>) -> String {
    match text {
        Some(t) => format!("{t:?}"),
        None => format!("#{id}"),
    }
}

fn tops(t: &[TokenProb], k: usize) -> String {
    t.iter()
        .take(k)
        .map(|x| format!("{} {:.2}", token(x.id, x.text.as_deref()), x.p))
        .collect::<Vec<_>>()
        .join(", ")
}

fn worst_position(out: &mut dyn Write, w: &WorstPositionReport) -> std::io::Result<()> {
    let target = match w.target {
        Some(t) => format!("  next {}", token(t as u32, w.target_text.as_deref())),
        None => String::new(),
    };
    let context = match &w.context {
        Some(c) if !c.is_empty() => format!("  after {:?}", c.concat()),
        _ => String::new(),
    };
    writeln!(
        out,
        "    {:>9}  row {} (prompt {} position {}){context}{target}",
        sci(w.kl),
        w.row,
        w.prompt,
        w.position
    )?;
    writeln!(out, "               reference: {}", tops(&w.ref_top, 3))?;
    writeln!(out, "               candidate: {}", tops(&w.cand_top, 3))
}

fn candidate(
    out: &mut dyn Write,
    i: usize,
    c: &CandidateReport,
    units: &str,
) -> std::io::Result<()> {
    writeln!(
        out,
        "\ncandidate {}: {}  ({}, {})",
        i + 1,
        c.name,
        c.path,
        c.dtype
    )?;
    row(out, "positions", format!("{}", c.positions))?;
    row(
        out,
        "kl mean",
        format!("{} {units}   {}", sci(c.kl.mean), interval(&c.kl)),
    )?;
    let p99 = match c.kl_p99_ci95 {
        Some([a, b]) => format!("   (p99 95% interval {} .. {})", sci(a), sci(b)),
        None => String::new(),
    };
    row(
        out,
        "kl p50 / p90 / p99",
        format!(
            "{} / {} / {}{p99}",
            sci(c.kl.p50),
            sci(c.kl.p90),
            sci(c.kl.p99)
        ),
    )?;
    row(
        out,
        "kl p99.9 / max",
        format!("{} / {}", sci(c.kl.p999), sci(c.kl.max)),
    )?;
    row(
        out,
        "reverse kl mean",
        format!("{} {units}", sci(c.kl_reverse.mean)),
    )?;
    if let Some(js) = &c.js {
        row(out, "js mean", format!("{} {units}", sci(js.mean)))?;
    }
    row(out, "total variation mean", sci(c.tv.mean))?;
    row(
        out,
        "top-1 agreement",
        format!("{:.2} %", 100.0 * c.top1_agree),
    )?;
    row(
        out,
        "entropy ref / cand",
        format!(
            "{} / {} {units}",
            sci(c.entropy_ref.mean),
            sci(c.entropy_cand.mean)
        ),
    )?;
    match (c.ppl_ref, c.ppl_cand, c.ppl_ratio) {
        (Some(a), Some(b), Some(r)) => row(
            out,
            "perplexity ref / cand",
            format!("{a:.4} / {b:.4}   ratio {r:.5}"),
        )?,
        _ => row(out, "perplexity", "n/a (no targets)".into())?,
    }
    row(
        out,
        "storage floor",
        format!("{} {units}", sci(c.storage_floor)),
    )?;
    if c.skipped_rows > 0 || c.infinite_kl > 0 {
        row(
            out,
            "skipped / infinite kl",
            format!("{} / {}", c.skipped_rows, c.infinite_kl),
        )?;
    }
    if !c.estimators.is_empty() {
        writeln!(
            out,
            "  sampled estimators (mean over positions; exact in brackets)"
        )?;
        for e in &c.estimators {
            writeln!(
                out,
                "    {:<7} {:>3}/pos  [{}]  k1 {} ±{}  k2 {} ±{}  k3 {} ±{}",
                e.direction,
                e.samples_per_position,
                sci(e.exact_mean),
                sci(e.k1.mean),
                sci(e.k1.std),
                sci(e.k2.mean),
                sci(e.k2.std),
                sci(e.k3.mean),
                sci(e.k3.std)
            )?;
        }
    }
    if !c.worst_positions.is_empty() {
        let n = c.worst_positions.len();
        let more = if n > TERMINAL_ROWS {
            format!(" ({TERMINAL_ROWS} of {n} shown; all in --json and --html)")
        } else {
            String::new()
        };
        writeln!(out, "  worst positions, highest kl first{more}")?;
        for w in c.worst_positions.iter().take(TERMINAL_ROWS) {
            worst_position(out, w)?;
        }
    }
    if !c.worst_prompts.is_empty() {
        writeln!(out, "  worst prompts, highest mean kl first")?;
        for p in c.worst_prompts.iter().take(TERMINAL_ROWS.min(5)) {
            writeln!(
                out,
                "    prompt {:<6} {:>6} positions  mean {}  max {}",
                p.prompt,
                p.positions,
                sci(p.kl_mean),
                sci(p.kl_max)
            )?;
        }
    }
    for g in &c.gates {
        let verdict = if g.pass { "pass" } else { "FAIL" };
        let unsure = match (g.uncertain, g.interval) {
            (true, Some([a, b])) => format!(
                "  (uncertain: the limit lies inside the 95% interval {} .. {})",
                sci(a),
                sci(b)
            ),
            (true, None) => "  (uncertain: the limit lies inside the 95% interval)".into(),
            _ => String::new(),
        };
        writeln!(
            out,
            "  gate {:<18} {verdict}  value {} limit {}{unsure}",
            g.name,
            sci(g.value),
            sci(g.limit)
        )?;
    }
    for w in &c.warnings {
        writeln!(out, "  warning: {w}")?;
    }
    Ok(())
}

impl Format for Text {
    fn write(&self, r: &Report, out: &mut dyn Write) -> std::io::Result<()> {
        let m = r
            .reference
            .model
            .as_deref()
            .map(|m| format!("  \"{m}\""))
            .unwrap_or_default();
        writeln!(
            out,
            "reference: {} ({}, {} rows x {} vocab, {} prompts){m}",
            r.reference.path,
            r.reference.dtype,
            r.reference.rows,
            r.reference.vocab,
            r.reference.prompts
        )?;
        for (i, c) in r.candidates.iter().enumerate() {
            candidate(out, i, c, r.units)?;
        }
        if r.ranking.len() > 1 {
            writeln!(out, "\nranking by mean kl (lowest first)")?;
            let w = r
                .ranking
                .iter()
                .map(|e| e.name.chars().count())
                .max()
                .unwrap_or(4)
                .max(4);
            writeln!(
                out,
                "  {:>4}  {:<w$}  {:>10}  {:>10}  {:>8}  {:<8}  next below",
                "rank", "name", "kl mean", "kl p99", "top-1", "gates"
            )?;
            for e in &r.ranking {
                let next = match e.vs_next {
                    Some("lower") => "clearly lower",
                    Some(_) => "not distinguishable",
                    None => "",
                };
                writeln!(
                    out,
                    "  {:>4}  {:<w$}  {:>10}  {:>10}  {:>7.2}%  {:<8}  {next}",
                    e.rank,
                    e.name,
                    sci(e.kl_mean),
                    sci(e.kl_p99),
                    100.0 * e.top1_agree,
                    e.gates
                )?;
            }
        }
        if !r.comparisons.is_empty() {
            writeln!(
                out,
                "\npaired differences of mean kl, on the positions both candidates have"
            )?;
            for p in &r.comparisons {
                let ci = p
                    .ci95
                    .map(|[a, b]| format!("{} .. {}", sci(a), sci(b)))
                    .unwrap_or_else(|| "-".into());
                let verdict = match p.verdict {
                    "a lower" => format!("{} is lower", p.a_name),
                    "b lower" => format!("{} is lower", p.b_name),
                    _ => "not distinguishable at 95%".into(),
                };
                writeln!(
                    out,
                    "  {} minus {}: {} {}  95% interval {}  ({} positions) -> {verdict}",
                    p.a_name,
                    p.b_name,
                    sci(p.kl_mean_diff),
                    r.units,
                    ci,
                    p.positions
                )?;
            }
        }
        writeln!(
            out,
            "\nexact pass: {:.2} s, {:.0} rows/s",
            r.timing.exact_pass_seconds, r.timing.rows_per_second
        )?;
        if r.candidates.iter().any(|c| !c.gates.is_empty()) {
            writeln!(out, "note: {}", r.notice)?;
        }
        Ok(())
    }
}
