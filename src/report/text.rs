//! The terminal summary: a short aligned table per candidate.

use super::{CandidateReport, Format, Report};
use crate::stats::Aggregate;
use std::io::Write;

pub struct Text;

fn sci(v: f64) -> String {
    if v.is_nan() {
        "-".into()
    } else if v.is_infinite() {
        if v > 0.0 { "inf".into() } else { "-inf".into() }
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

fn candidate(out: &mut dyn Write, i: usize, c: &CandidateReport, units: &str) -> std::io::Result<()> {
    let name = c.model.as_deref().map(|m| format!("  \"{m}\"")).unwrap_or_default();
    writeln!(out, "\ncandidate {}: {} ({}){name}", i + 1, c.path, c.dtype)?;
    row(out, "positions", format!("{}", c.positions))?;
    row(out, "kl mean", format!("{} {units}   {}", sci(c.kl.mean), interval(&c.kl)))?;
    row(out, "kl p50 / p90 / p99", format!("{} / {} / {}", sci(c.kl.p50), sci(c.kl.p90), sci(c.kl.p99)))?;
    row(out, "kl p99.9 / max", format!("{} / {}", sci(c.kl.p999), sci(c.kl.max)))?;
    row(out, "reverse kl mean", format!("{} {units}", sci(c.kl_reverse.mean)))?;
    if let Some(js) = &c.js {
        row(out, "js mean", format!("{} {units}", sci(js.mean)))?;
    }
    row(out, "total variation mean", sci(c.tv.mean))?;
    row(out, "top-1 agreement", format!("{:.2} %", 100.0 * c.top1_agree))?;
    row(out, "entropy ref / cand", format!("{} / {} {units}", sci(c.entropy_ref.mean), sci(c.entropy_cand.mean)))?;
    match (c.ppl_ref, c.ppl_cand, c.ppl_ratio) {
        (Some(a), Some(b), Some(r)) => row(out, "perplexity ref / cand", format!("{a:.4} / {b:.4}   ratio {r:.5}"))?,
        _ => row(out, "perplexity", "n/a (no targets)".into())?,
    }
    row(out, "storage floor", format!("{} {units}", sci(c.storage_floor)))?;
    if c.skipped_rows > 0 || c.infinite_kl > 0 {
        row(out, "skipped / infinite kl", format!("{} / {}", c.skipped_rows, c.infinite_kl))?;
    }
    if !c.estimators.is_empty() {
        writeln!(out, "  sampled estimators (mean over positions; exact in brackets)")?;
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
    for g in &c.gates {
        let verdict = if g.pass { "pass" } else { "FAIL" };
        let unsure = if g.uncertain { "  (uncertain: the limit lies inside the 95% interval)" } else { "" };
        writeln!(out, "  gate {:<18} {verdict}  value {} limit {}{unsure}", g.name, sci(g.value), sci(g.limit))?;
    }
    for w in &c.warnings {
        writeln!(out, "  warning: {w}")?;
    }
    Ok(())
}

impl Format for Text {
    fn write(&self, r: &Report, out: &mut dyn Write) -> std::io::Result<()> {
        let m = r.reference.model.as_deref().map(|m| format!("  \"{m}\"")).unwrap_or_default();
        writeln!(
            out,
            "reference: {} ({}, {} rows x {} vocab, {} prompts){m}",
            r.reference.path, r.reference.dtype, r.reference.rows, r.reference.vocab, r.reference.prompts
        )?;
        for (i, c) in r.candidates.iter().enumerate() {
            candidate(out, i, c, r.units)?;
        }
        if !r.comparisons.is_empty() {
            writeln!(out, "\npaired differences of mean kl (same positions)")?;
            for p in &r.comparisons {
                let ci = p.ci95.map(|[a, b]| format!("{} .. {}", sci(a), sci(b))).unwrap_or_else(|| "-".into());
                writeln!(out, "  {} - {}: {} {}  95% {}  -> {}", p.a + 1, p.b + 1, sci(p.kl_mean_diff), r.units, ci, p.verdict)?;
            }
        }
        writeln!(out, "\nexact pass: {:.2} s, {:.0} rows/s", r.timing.exact_pass_seconds, r.timing.rows_per_second)?;
        if r.candidates.iter().any(|c| !c.gates.is_empty()) {
            writeln!(out, "note: {}", r.notice)?;
        }
        Ok(())
    }
}
