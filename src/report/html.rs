//! `--html`: one self-contained page a person reads.
//!
//! Everything is inline: the style sheet, a few lines of script that only
//! count what rendered (for automated checks), and SVG plots drawn here from
//! the report's binned data (a histogram with 10 bins per decade, kl binned by
//! position), so a run over millions of positions still makes a page of a few
//! hundred kilobytes that opens at once. Nothing is fetched from anywhere.
//!
//! Every panel of one kind shares its axes across candidates, so the panels
//! can be compared at a glance.

// Tests such as `!(span > 0.0)` are meant to be true for NaN (a missing or
// undefined value draws nothing), which `span <= 0.0` would not be.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

use super::{CandidateReport, Format, Gate, Report, TokenProb, WorstPositionReport};
use std::fmt::Write as _;
use std::io::Write;

pub struct Html;

/// One colour per candidate, in command-line order.
const PALETTE: [&str; 6] = [
    "#23708f", "#c25a1b", "#6b4d9a", "#2f7d4a", "#b33d62", "#7d6a1c",
];
/// Lighter fills of the same hues (bands, bars).
const PALE: [&str; 6] = [
    "#b9d7e3", "#f1cdb6", "#d6cbe8", "#bfdcc8", "#ecc1cf", "#e3d9b0",
];

fn colour(i: usize) -> &'static str {
    PALETTE[i % PALETTE.len()]
}
fn pale(i: usize) -> &'static str {
    PALE[i % PALE.len()]
}

/// Escapes text for HTML element content and attribute values.
pub fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

/// A number for people: three significant digits, scientific outside 1e-3..1e4.
pub fn num(v: f64) -> String {
    if v.is_nan() {
        return "–".into();
    }
    if v.is_infinite() {
        return if v > 0.0 {
            "∞".into()
        } else {
            "−∞".into()
        };
    }
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if (1e-3..1e4).contains(&a) {
        let digits = (2 - a.log10().floor() as i32).clamp(0, 6) as usize;
        format!("{v:.digits$}")
    } else {
        let s = format!("{v:.2e}");
        // 1.23e-5 -> 1.23·10⁻⁵
        match s.split_once('e') {
            Some((m, e)) => format!("{m}×10{}", superscript(e.parse::<i32>().unwrap_or(0))),
            None => s,
        }
    }
}

fn pct(v: f64) -> String {
    if v.is_nan() {
        "–".into()
    } else {
        format!("{:.2}%", 100.0 * v)
    }
}

fn superscript(e: i32) -> String {
    let digits = ['⁰', '¹', '²', '³', '⁴', '⁵', '⁶', '⁷', '⁸', '⁹'];
    let mut s = String::new();
    if e < 0 {
        s.push('⁻');
    }
    for ch in e.unsigned_abs().to_string().chars() {
        s.push(digits[ch.to_digit(10).unwrap() as usize]);
    }
    s
}

fn decade_label(e: i32) -> String {
    match e {
        0 => "1".into(),
        1 => "10".into(),
        _ => format!("10{}", superscript(e)),
    }
}

/// Pixel coordinates with one decimal (keeps the page small).
fn f(v: f64) -> String {
    if v.is_finite() {
        let s = format!("{v:.1}");
        s.strip_suffix(".0").map(str::to_string).unwrap_or(s)
    } else {
        "0".into()
    }
}

/// A linear or log10 map from data to pixels.
#[derive(Clone, Copy)]
struct Scale {
    d0: f64,
    d1: f64,
    r0: f64,
    r1: f64,
    log: bool,
}

impl Scale {
    fn lin(d0: f64, d1: f64, r0: f64, r1: f64) -> Scale {
        Scale {
            d0,
            d1,
            r0,
            r1,
            log: false,
        }
    }
    /// `d0`, `d1` are exponents of ten.
    fn log(d0: f64, d1: f64, r0: f64, r1: f64) -> Scale {
        Scale {
            d0,
            d1,
            r0,
            r1,
            log: true,
        }
    }
    fn at(&self, v: f64) -> f64 {
        let x = if self.log {
            if v <= 0.0 {
                self.d0
            } else {
                v.log10()
            }
        } else {
            v
        };
        let t = if self.d1 == self.d0 {
            0.5
        } else {
            (x - self.d0) / (self.d1 - self.d0)
        };
        self.r0 + t.clamp(-0.02, 1.02) * (self.r1 - self.r0)
    }
}

/// Geometry of one plot panel (SVG user units).
const W: f64 = 480.0;
const H: f64 = 260.0;
const ML: f64 = 52.0;
const MR: f64 = 44.0;
const MT: f64 = 30.0;
const MB: f64 = 40.0;

struct Svg {
    s: String,
}

impl Svg {
    fn new(label: &str, h: f64) -> Svg {
        Svg::wide(label, W, h, "plot")
    }
    fn wide(label: &str, w: f64, h: f64, class: &str) -> Svg {
        let mut s = String::new();
        let _ = write!(
            s,
            r#"<svg class="{class}" viewBox="0 0 {} {}" role="img" aria-label="{}">"#,
            f(w),
            f(h),
            esc(label)
        );
        Svg { s }
    }
    fn raw(&mut self, x: &str) {
        self.s.push_str(x);
    }
    fn line(&mut self, x1: f64, y1: f64, x2: f64, y2: f64, class: &str) {
        let _ = write!(
            self.s,
            r#"<path class="{class}" d="M{} {}L{} {}"/>"#,
            f(x1),
            f(y1),
            f(x2),
            f(y2)
        );
    }
    fn text(&mut self, x: f64, y: f64, anchor: &str, class: &str, t: &str) {
        let _ = write!(
            self.s,
            r#"<text x="{}" y="{}" text-anchor="{anchor}" class="{class}">{}</text>"#,
            f(x),
            f(y),
            esc(t)
        );
    }
    fn finish(mut self) -> String {
        self.s.push_str("</svg>");
        self.s
    }
}

/// Frame, grid and decade ticks of a log x axis over [e0, e1] (exponents).
fn log_x_axis(svg: &mut Svg, sx: &Scale, e0: i32, e1: i32, y0: f64, y1: f64, title: &str) {
    let step = if e1 - e0 > 10 { 2 } else { 1 };
    let mut e = e0;
    while e <= e1 {
        let x = sx.at(10f64.powi(e));
        svg.line(x, y0, x, y1, "grid");
        svg.text(x, y0 + 14.0, "middle", "tick", &decade_label(e));
        e += step;
    }
    svg.text((sx.r0 + sx.r1) / 2.0, y0 + 31.0, "middle", "axis", title);
}

fn frame(svg: &mut Svg, x0: f64, y0: f64, x1: f64, y1: f64) {
    let _ = write!(
        svg.s,
        r#"<rect class="frame" x="{}" y="{}" width="{}" height="{}"/>"#,
        f(x0),
        f(y1),
        f(x1 - x0),
        f(y0 - y1)
    );
}

/// A short "nice" step for a linear axis covering `span` in about `n` steps.
fn nice_step(span: f64, n: f64) -> f64 {
    if !(span > 0.0) {
        return 1.0;
    }
    let raw = span / n;
    let p = 10f64.powf(raw.log10().floor());
    let m = raw / p;
    let k = if m < 1.5 {
        1.0
    } else if m < 3.5 {
        2.0
    } else if m < 7.5 {
        5.0
    } else {
        10.0
    };
    k * p
}

/// Everything that the page needs per candidate beyond the report.
struct Cand<'a> {
    i: usize,
    c: &'a CandidateReport,
}

fn gate_phrase(g: &Gate, units: &str) -> String {
    match g.name.as_str() {
        "max-kl-mean" => format!("mean kl at most {} {units}", num(g.limit)),
        "max-kl-p99" => format!("99th percentile of kl at most {} {units}", num(g.limit)),
        "min-top1" => format!("top-1 agreement at least {}", pct(g.limit)),
        n => format!("{n} {}", num(g.limit)),
    }
}

fn gate_value(g: &Gate) -> String {
    if g.name == "min-top1" {
        pct(g.value)
    } else {
        num(g.value)
    }
}

/// A small strip showing a gate's value, its 95% interval and the limit.
fn gate_strip(g: &Gate) -> String {
    let (w, h) = (190.0, 22.0);
    let is_top1 = g.name == "min-top1";
    let vals: Vec<f64> = [
        Some(g.value),
        Some(g.limit),
        g.interval.map(|i| i[0]),
        g.interval.map(|i| i[1]),
    ]
    .into_iter()
    .flatten()
    .filter(|v| v.is_finite())
    .collect();
    if vals.is_empty() {
        return String::new();
    }
    let sc = if is_top1 {
        let lo = vals.iter().cloned().fold(1.0, f64::min);
        let lo = (lo - 0.25 * (1.0 - lo)).max(0.0);
        Scale::lin(lo, 1.0, 8.0, w - 8.0)
    } else {
        let pos: Vec<f64> = vals.iter().cloned().filter(|&v| v > 0.0).collect();
        let lo = pos.iter().cloned().fold(f64::INFINITY, f64::min).log10();
        let hi = pos
            .iter()
            .cloned()
            .fold(f64::NEG_INFINITY, f64::max)
            .log10();
        let (lo, hi) = if lo.is_finite() {
            (lo - 0.4, hi + 0.4)
        } else {
            (-3.0, 0.0)
        };
        Scale::log(lo, hi, 8.0, w - 8.0)
    };
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg class="strip" viewBox="0 0 {w} {h}" role="img" aria-label="value against limit">"#
    );
    // The side of the limit that fails is shaded.
    let xl = sc.at(g.limit);
    let (fx0, fx1) = if is_top1 { (8.0, xl) } else { (xl, w - 8.0) };
    let _ = write!(
        s,
        r#"<rect class="failside" x="{}" y="3" width="{}" height="16"/>"#,
        f(fx0.min(fx1)),
        f((fx1 - fx0).abs())
    );
    let _ = write!(s, r#"<path class="stripaxis" d="M8 11H{}"/>"#, f(w - 8.0));
    if let Some([a, b]) = g.interval {
        let _ = write!(
            s,
            r#"<path class="whisker" d="M{} 11H{}M{} 7V15M{} 7V15"/>"#,
            f(sc.at(a)),
            f(sc.at(b)),
            f(sc.at(a)),
            f(sc.at(b))
        );
    }
    let _ = write!(s, r#"<path class="limit" d="M{} 2V20"/>"#, f(xl));
    let cls = if g.pass { "dot pass" } else { "dot fail" };
    let _ = write!(
        s,
        r#"<circle class="{cls}" cx="{}" cy="11" r="4.5"><title>value {}</title></circle>"#,
        f(sc.at(g.value)),
        esc(&gate_value(g))
    );
    s.push_str("</svg>");
    s
}

fn verdict_cards(out: &mut String, r: &Report, cands: &[Cand]) {
    out.push_str(r#"<section id="verdict"><h2>Verdict</h2><div class="cards">"#);
    for k in cands {
        let c = k.c;
        let failed = c.gates.iter().filter(|g| !g.pass).count();
        let unsure = c.gates.iter().filter(|g| g.uncertain).count();
        let (cls, head) = if c.gates.is_empty() {
            ("none", "no gates were set".to_string())
        } else if failed == 0 {
            ("pass", format!("passes all {} gates", c.gates.len()))
        } else {
            ("fail", format!("fails {failed} of {} gates", c.gates.len()))
        };
        let _ = write!(
            out,
            r#"<div class="card {cls}" style="--c:{}"><div class="cardhead"><span class="swatch"></span><b>{}</b><span class="file">{} · {}</span></div><div class="big">{head}</div>"#,
            colour(k.i),
            esc(&c.name),
            esc(&c.path),
            c.dtype
        );
        if !c.gates.is_empty() {
            out.push_str(r#"<table class="gates">"#);
            for g in &c.gates {
                let mark = if g.pass {
                    r#"<span class="ok">pass</span>"#
                } else {
                    r#"<span class="bad">fail</span>"#
                };
                let note = if g.uncertain {
                    let iv = g
                        .interval
                        .map(|[a, b]| format!(" ({} … {})", num(a), num(b)))
                        .unwrap_or_default();
                    format!(
                        r#"<div class="unsure">uncertain: the limit lies inside the 95% interval{}</div>"#,
                        esc(&iv)
                    )
                } else {
                    String::new()
                };
                let _ = write!(
                    out,
                    "<tr><td>{mark}</td><td>{}<div class=\"val\">measured {}</div>{note}</td><td>{}</td></tr>",
                    esc(&gate_phrase(g, r.units)),
                    esc(&gate_value(g)),
                    gate_strip(g)
                );
            }
            out.push_str("</table>");
        }
        if unsure > 0 {
            out.push_str(r#"<p class="small">An uncertain verdict could flip with another sample of prompts of the same kind: measure on more prompts before relying on it.</p>"#);
        }
        let w = c.warnings.len();
        if w > 0 {
            let _ = write!(
                out,
                r##"<p class="small warnlink"><a href="#warnings">{w} warning{}</a> below</p>"##,
                if w == 1 { "" } else { "s" }
            );
        }
        out.push_str("</div>");
    }
    out.push_str("</div>");
    if cands.iter().any(|k| !k.c.gates.is_empty()) {
        out.push_str(r#"<p class="small">In each strip: the dot is the measured value, the whisker its 95% interval, the red line the limit; the shaded side fails.</p>"#);
    }
    let _ = write!(out, r#"<p class="notice">{}</p></section>"#, esc(r.notice));
}

fn ranking(out: &mut String, r: &Report) {
    if r.ranking.len() < 2 {
        return;
    }
    out.push_str(r#"<section id="ranking"><h2>Ranking</h2><p class="lead">Candidates by mean kl, lowest first. “Next below” tells whether the paired difference to the next candidate, measured on the same positions, excludes zero at 95%.</p><table class="data"><thead><tr><th>rank</th><th>candidate</th><th>mean kl</th><th>95% interval</th><th>p99</th><th>top-1 agreement</th><th>gates</th><th>next below</th></tr></thead><tbody>"#);
    for e in &r.ranking {
        let ci = e
            .kl_ci95
            .map(|[a, b]| format!("{} … {}", num(a), num(b)))
            .unwrap_or_else(|| "–".into());
        let next = match e.vs_next {
            Some("lower") => "clearly lower",
            Some(_) => "not distinguishable",
            None => "",
        };
        let g = match e.gates {
            "pass" => r#"<span class="ok">pass</span>"#,
            "fail" => r#"<span class="bad">fail</span>"#,
            _ => "–",
        };
        let _ = write!(
            out,
            r#"<tr><td class="n">{}</td><td><span class="swatch" style="--c:{}"></span>{}</td><td class="n">{}</td><td class="n">{}</td><td class="n">{}</td><td class="n">{}</td><td>{g}</td><td>{next}</td></tr>"#,
            e.rank,
            colour(e.candidate),
            esc(&e.name),
            num(e.kl_mean),
            ci,
            num(e.kl_p99),
            pct(e.top1_agree)
        );
    }
    out.push_str("</tbody></table>");
    if !r.comparisons.is_empty() {
        let _ = write!(
            out,
            r#"<h3>Paired differences</h3><p class="lead">Mean of kl(first) − kl(second) over the positions both candidates have, with a 95% interval that treats prompts as clusters. Pairing removes the variation between prompts that both candidates share, so it separates candidates that the single intervals cannot.</p>"#
        );
        out.push_str(&pairs_plot(r));
    }
    out.push_str("</section>");
}

fn pairs_plot(r: &Report) -> String {
    let n = r.comparisons.len();
    let rowh = 30.0;
    let h = MT + rowh * n as f64 + MB;
    let pw = 860.0;
    let (x0, x1) = (300.0, pw - 30.0);
    let mut m = 0f64;
    for p in &r.comparisons {
        m = m.max(p.kl_mean_diff.abs());
        if let Some([a, b]) = p.ci95 {
            m = m.max(a.abs()).max(b.abs());
        }
    }
    if !(m > 0.0) || !m.is_finite() {
        m = 1.0;
    }
    let step = nice_step(2.0 * m, 4.0);
    let m = (m / step).ceil() * step;
    let sx = Scale::lin(-m, m, x0, x1);
    let mut svg = Svg::wide("paired differences of mean kl", pw, h, "plot pairs");
    let yb = h - MB;
    frame(&mut svg, x0, yb, x1, MT - 6.0);
    let mut t = -m;
    while t <= m + 1e-12 * m {
        let x = sx.at(t);
        svg.line(
            x,
            yb,
            x,
            MT - 6.0,
            if t.abs() < 1e-12 * m { "zero" } else { "grid" },
        );
        svg.text(
            x,
            yb + 14.0,
            "middle",
            "tick",
            &tick_num(if t.abs() < 1e-12 * m { 0.0 } else { t }),
        );
        t += step;
    }
    svg.text(
        (x0 + x1) / 2.0,
        yb + 31.0,
        "middle",
        "axis",
        &format!(
            "difference of mean kl ({}) — left of zero: the first is lower",
            r.units
        ),
    );
    for (j, p) in r.comparisons.iter().enumerate() {
        let y = MT + rowh * (j as f64 + 0.5);
        svg.text(
            x0 - 8.0,
            y - 2.0,
            "end",
            "label",
            &format!("{} − {}", p.a_name, p.b_name),
        );
        let verdict = match p.verdict {
            "a lower" => format!("{} lower", p.a_name),
            "b lower" => format!("{} lower", p.b_name),
            _ => "not distinguishable".into(),
        };
        svg.text(x0 - 8.0, y + 10.0, "end", "sublabel", &verdict);
        if let Some([a, b]) = p.ci95 {
            let _ = write!(
                svg.s,
                r#"<path class="whisk" d="M{} {}H{}M{} {}V{}M{} {}V{}"/>"#,
                f(sx.at(a)),
                f(y),
                f(sx.at(b)),
                f(sx.at(a)),
                f(y - 5.0),
                f(y + 5.0),
                f(sx.at(b)),
                f(y - 5.0),
                f(y + 5.0)
            );
        }
        let ci = p
            .ci95
            .map(|[a, b]| format!(", 95% {} … {}", num(a), num(b)))
            .unwrap_or_default();
        let _ = write!(
            svg.s,
            r#"<circle class="pt" cx="{}" cy="{}" r="4.5"><title>{} minus {}: {}{} ({} positions)</title></circle>"#,
            f(sx.at(p.kl_mean_diff)),
            f(y),
            esc(&p.a_name),
            esc(&p.b_name),
            esc(&num(p.kl_mean_diff)),
            esc(&ci),
            p.positions
        );
    }
    svg.finish()
}

fn ci_text(ci: Option<[f64; 2]>) -> String {
    ci.map(|[a, b]| format!(r#"<div class="ci">{} … {}</div>"#, num(a), num(b)))
        .unwrap_or_default()
}

fn summary(out: &mut String, r: &Report, cands: &[Cand]) {
    let u = r.units;
    out.push_str(
        r#"<section id="summary"><h2>Summary</h2><table class="data summary"><thead><tr><th></th>"#,
    );
    for k in cands {
        let _ = write!(
            out,
            r#"<th><span class="swatch" style="--c:{}"></span>{}</th>"#,
            colour(k.i),
            esc(&k.c.name)
        );
    }
    out.push_str("</tr></thead><tbody>");
    let mut row = |label: &str, cell: &dyn Fn(&CandidateReport) -> String| {
        let _ = write!(out, "<tr><th>{label}</th>");
        for k in cands {
            let _ = write!(out, r#"<td class="n">{}</td>"#, cell(k.c));
        }
        out.push_str("</tr>");
    };
    row("positions counted", &|c| c.positions.to_string());
    row(
        &format!("mean kl ({u}) <span class=\"ci\">95% interval</span>"),
        &|c| format!("<b>{}</b>{}", num(c.kl.mean), ci_text(c.kl.ci95)),
    );
    row("median kl", &|c| num(c.kl.p50));
    row("90th percentile", &|c| num(c.kl.p90));
    row(
        "99th percentile <span class=\"ci\">95% interval</span>",
        &|c| format!("{}{}", num(c.kl.p99), ci_text(c.kl_p99_ci95)),
    );
    row("99.9th percentile", &|c| num(c.kl.p999));
    row("largest kl", &|c| num(c.kl.max));
    row(&format!("reverse kl, mean ({u})"), &|c| {
        num(c.kl_reverse.mean)
    });
    if cands.iter().any(|k| k.c.js.is_some()) {
        row(&format!("Jensen-Shannon, mean ({u})"), &|c| {
            c.js.as_ref()
                .map(|a| num(a.mean))
                .unwrap_or_else(|| "–".into())
        });
    }
    row("total variation, mean", &|c| num(c.tv.mean));
    row("top-1 agreement", &|c| pct(c.top1_agree));
    row(&format!("entropy reference / candidate ({u})"), &|c| {
        format!("{} / {}", num(c.entropy_ref.mean), num(c.entropy_cand.mean))
    });
    row(
        "perplexity reference / candidate",
        &|c| match (c.ppl_ref, c.ppl_cand) {
            (Some(a), Some(b)) => format!("{} / {}", num(a), num(b)),
            _ => "no targets".into(),
        },
    );
    row("perplexity ratio", &|c| {
        c.ppl_ratio
            .map(|x| format!("{x:.4}"))
            .unwrap_or_else(|| "–".into())
    });
    row(&format!("storage floor ({u})"), &|c| num(c.storage_floor));
    row("skipped rows / infinite kl", &|c| {
        format!("{} / {}", c.skipped_rows, c.infinite_kl)
    });
    out.push_str("</tbody></table>");
    let _ = write!(
        out,
        r#"<p class="small">Reference: <b>{}</b> — {} ({}, {} rows × {} vocabulary, {} prompts, grouped by {}). Compared columns: {}. kl is KL(reference ‖ candidate) in {u}; intervals treat prompts as clusters.</p></section>"#,
        esc(r.reference.model.as_deref().unwrap_or("")),
        esc(&r.reference.path),
        r.reference.dtype,
        r.reference.rows,
        r.reference.vocab,
        r.reference.prompts,
        r.reference.grouping,
        r.settings.compared_vocab
    );
}

/// Decade range [e0, e1] that holds every histogram bin and marker.
fn kl_decades(cands: &[Cand]) -> (i32, i32) {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    let mut see = |v: f64| {
        if v > 0.0 && v.is_finite() {
            lo = lo.min(v);
            hi = hi.max(v);
        }
    };
    for k in cands {
        let c = k.c;
        if let Some(b) = c.kl_histogram.bins.first() {
            see(b.lo);
        }
        if let Some(b) = c.kl_histogram.bins.last() {
            see(b.hi);
        }
        see(c.kl.mean);
        see(c.storage_floor);
        for g in &c.gates {
            if g.name != "min-top1" {
                see(g.limit);
            }
        }
    }
    if !lo.is_finite() {
        return (-6, 0);
    }
    let (a, b) = (lo.log10().floor() as i32, hi.log10().ceil() as i32);
    (a.max(-14), b.max(a + 1).min(4))
}

fn distribution(out: &mut String, r: &Report, cands: &[Cand]) {
    let u = r.units;
    let (e0, e1) = kl_decades(cands);
    let (x0, x1, y0, y1) = (ML, W - MR, H - MB, MT);
    let sx = Scale::log(e0 as f64, e1 as f64, x0, x1);
    // The shared y range: the largest share of positions in one bin.
    let mut ymax = 0f64;
    for k in cands {
        let n = k.c.positions.max(1) as f64;
        for b in &k.c.kl_histogram.bins {
            ymax = ymax.max(b.count as f64 / n);
        }
    }
    let ystep = nice_step(ymax.max(1e-3), 4.0);
    let ymax = ((ymax * 1.08) / ystep).ceil().max(1.0) * ystep;
    let sy = Scale::lin(0.0, ymax, y0, y1);
    let sc = Scale::lin(0.0, 1.0, y0, y1);

    out.push_str(
        r#"<section id="distribution"><h2>How kl is distributed over positions</h2><p class="lead">Bars: share of positions per bin (10 bins per factor of ten, left axis). Line: share of positions at or below that kl (right axis). Vertical marks: mean, 99th percentile, gate limits; the grey zone left of the storage floor is what rounding of the stored logits alone would produce. All panels share their axes.</p><div class="panels">"#,
    );
    for k in cands {
        let c = k.c;
        let n = c.positions.max(1) as f64;
        let mut svg = Svg::new(&format!("distribution of kl, {}", c.name), H);
        svg.text(x0, 18.0, "start", "ptitle", &c.name);
        // Storage floor zone.
        if c.storage_floor > 0.0 && c.storage_floor.is_finite() {
            let xf = sx.at(c.storage_floor);
            let _ = write!(
                svg.s,
                r#"<rect class="floor" x="{}" y="{}" width="{}" height="{}"><title>storage floor {} {u}</title></rect>"#,
                f(x0),
                f(y1),
                f((xf - x0).max(0.0)),
                f(y0 - y1),
                esc(&num(c.storage_floor))
            );
        }
        frame(&mut svg, x0, y0, x1, y1);
        log_x_axis(
            &mut svg,
            &sx,
            e0,
            e1,
            y0,
            y1,
            &format!("kl per position ({u}, log scale)"),
        );
        let mut t = 0.0;
        while t <= ymax + 1e-12 {
            let y = sy.at(t);
            svg.line(x0 - 3.0, y, x0, y, "tickmark");
            svg.text(
                x0 - 5.0,
                y + 3.5,
                "end",
                "tick",
                &format!("{}%", trim_pct(100.0 * t)),
            );
            t += ystep;
        }
        for q in [0.0, 0.5, 1.0] {
            let y = sc.at(q);
            svg.text(
                x1 + 5.0,
                y + 3.5,
                "start",
                "tick cum",
                &format!("{:.0}%", 100.0 * q),
            );
        }
        for b in &c.kl_histogram.bins {
            let (xa, xb) = (sx.at(b.lo), sx.at(b.hi));
            let share = b.count as f64 / n;
            let y = sy.at(share);
            let _ = write!(
                svg.s,
                r#"<rect class="bar" style="fill:{}" x="{}" y="{}" width="{}" height="{}"><title>{} … {} {u}: {} positions ({})</title></rect>"#,
                pale(k.i),
                f(xa + 0.3),
                f(y),
                f((xb - xa - 0.6).max(0.4)),
                f(y0 - y),
                esc(&num(b.lo)),
                esc(&num(b.hi)),
                b.count,
                pct(share)
            );
        }
        // Cumulative share, a step at each bin's upper edge.
        let mut cum = c.kl_histogram.below as f64;
        let mut d = format!("M{} {}", f(x0), f(sc.at(cum / n)));
        for b in &c.kl_histogram.bins {
            let xa = sx.at(b.lo);
            let _ = write!(d, "L{} {}", f(xa), f(sc.at(cum / n)));
            cum += b.count as f64;
            let _ = write!(d, "L{} {}", f(sx.at(b.hi)), f(sc.at(cum / n)));
        }
        let _ = write!(d, "L{} {}", f(x1), f(sc.at(cum / n)));
        let _ = write!(
            svg.s,
            r#"<path class="cumline" style="stroke:{}" d="{d}"/>"#,
            colour(k.i)
        );
        // Markers, labels staggered so that close ones stay readable.
        let mut marks: Vec<(f64, &str, String)> = vec![
            (c.kl.mean, "mark", "mean".into()),
            (c.kl.p99, "mark dash", "p99".into()),
        ];
        for g in &c.gates {
            if g.name == "max-kl-mean" || g.name == "max-kl-p99" {
                let what = if g.name == "max-kl-mean" {
                    "mean limit"
                } else {
                    "p99 limit"
                };
                marks.push((g.limit, "limit", what.into()));
            }
        }
        marks.retain(|m| m.0 > 0.0 && m.0.is_finite());
        marks.sort_by(|a, b| a.0.total_cmp(&b.0));
        // Labels run down beside their line; a label too close to the
        // previous one moves to the other side.
        let mut last = f64::NEG_INFINITY;
        let mut left = false;
        for (v, cls, label) in marks.iter() {
            let x = sx.at(*v);
            svg.line(x, y0, x, y1, cls);
            left = if x - last < 11.0 { !left } else { false };
            last = x;
            let lx = if left { x - 3.0 } else { x + 9.0 };
            let _ = write!(
                svg.s,
                r#"<text class="{}" text-anchor="end" transform="translate({} {}) rotate(-90)">{}</text>"#,
                if *cls == "limit" {
                    "mlabel lim"
                } else {
                    "mlabel"
                },
                f(lx),
                f(y1 + 4.0),
                esc(label)
            );
        }
        let above = c.kl_histogram.above;
        if above > 0 {
            svg.text(
                x1 - 4.0,
                y0 - 6.0,
                "end",
                "note",
                &format!(
                    "{above} at ≥ {} or infinite",
                    num(c.kl_histogram.highest_edge)
                ),
            );
        }
        out.push_str(&svg.finish());
    }
    out.push_str("</div>");
    tail_plot(out, r, cands, e0, e1);
    out.push_str("</section>");
}

/// A tick label: as few digits as the value needs.
fn tick_num(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if (1e-4..1e5).contains(&a) {
        let mut s = format!("{v:.6}");
        while s.ends_with('0') {
            s.pop();
        }
        if s.ends_with('.') {
            s.pop();
        }
        s.replace('-', "−")
    } else {
        num(v)
    }
}

fn trim_pct(v: f64) -> String {
    let s = format!("{v:.1}");
    s.strip_suffix(".0").map(str::to_string).unwrap_or(s)
}

/// All candidates on one plot: the share of positions whose kl exceeds x, on
/// log-log axes, where the tail (and so the 99th percentile) is easy to see.
fn tail_plot(out: &mut String, r: &Report, cands: &[Cand], e0: i32, e1: i32) {
    let u = r.units;
    let nmax = cands
        .iter()
        .map(|k| k.c.positions)
        .max()
        .unwrap_or(1)
        .max(10);
    let ye0 = -((nmax as f64).log10().ceil() as i32);
    let (x0, x1, y0, y1) = (ML, W - MR, H - MB, MT);
    let sx = Scale::log(e0 as f64, e1 as f64, x0, x1);
    let sy = Scale::log(ye0 as f64, 0.0, y0, y1);
    let mut svg = Svg::new("share of positions above each kl, all candidates", H);
    svg.text(
        x0,
        18.0,
        "start",
        "ptitle",
        "Tail: share of positions with kl above x",
    );
    frame(&mut svg, x0, y0, x1, y1);
    log_x_axis(
        &mut svg,
        &sx,
        e0,
        e1,
        y0,
        y1,
        &format!("kl ({u}, log scale)"),
    );
    for e in ye0..=0 {
        let y = sy.at(10f64.powi(e));
        svg.line(x0, y, x1, y, "grid");
        let label = match e {
            0 => "100%".to_string(),
            -1 => "10%".into(),
            -2 => "1%".into(),
            -3 => "0.1%".into(),
            _ => decade_label(e),
        };
        svg.text(x0 - 5.0, y + 3.5, "end", "tick", &label);
    }
    // The 1% line: where a curve crosses it is that candidate's p99.
    let y99 = sy.at(0.01);
    svg.line(x0, y99, x1, y99, "p99line");
    svg.text(
        x0 + 4.0,
        y99 - 4.0,
        "start",
        "mlabel",
        "1% of positions: p99 where crossed",
    );
    for k in cands {
        for g in &k.c.gates {
            if g.name == "max-kl-p99" {
                let x = sx.at(g.limit);
                svg.line(x, y0, x, y1, "limit");
            }
        }
    }
    for k in cands {
        let c = k.c;
        let n = c.positions.max(1) as f64;
        let mut rest = n - c.kl_histogram.below as f64;
        let mut d = String::new();
        let mut first = true;
        for b in &c.kl_histogram.bins {
            let share = rest / n;
            if share <= 0.0 {
                break;
            }
            let y = sy.at(share);
            let _ = write!(
                d,
                "{}{} {}",
                if first { "M" } else { "L" },
                f(sx.at(b.lo)),
                f(y)
            );
            first = false;
            rest -= b.count as f64;
            let _ = write!(d, "L{} {}", f(sx.at(b.hi)), f(y));
            if rest > 0.0 {
                let _ = write!(d, "L{} {}", f(sx.at(b.hi)), f(sy.at(rest / n)));
            }
        }
        if !d.is_empty() {
            let _ = write!(
                svg.s,
                r#"<path class="tailline" style="stroke:{}" d="{d}"><title>{}</title></path>"#,
                colour(k.i),
                esc(&c.name)
            );
        }
    }
    legend(
        &mut svg,
        cands,
        x0 + 8.0,
        y0 - 10.0 - 14.0 * (cands.len() as f64 - 1.0),
    );
    out.push_str(r#"<div class="panels">"#);
    out.push_str(&svg.finish());
    out.push_str(&threshold_table(r, cands, e0, e1));
    out.push_str("</div>");
}

/// Share of positions above each decade of kl, from the histogram (the
/// decades are bin edges, so these shares are exact counts).
fn threshold_table(r: &Report, cands: &[Cand], e0: i32, e1: i32) -> String {
    let mut s = String::from(
        r#"<div class="side"><h4>Share of positions above</h4><table class="data"><thead><tr><th>kl above</th>"#,
    );
    for k in cands {
        let _ = write!(
            s,
            r#"<th><span class="swatch" style="--c:{}"></span>{}</th>"#,
            colour(k.i),
            esc(&k.c.name)
        );
    }
    s.push_str("</tr></thead><tbody>");
    // Positions above 10^e, per candidate: bins whose lower edge is at or
    // above it (edges are powers of ten up to rounding, hence the tolerance).
    let above = |k: &Cand, e: i32| -> u64 {
        let t = 10f64.powi(e);
        let h = &k.c.kl_histogram;
        h.bins
            .iter()
            .filter(|b| b.lo >= t * (1.0 - 1e-9))
            .map(|b| b.count)
            .sum::<u64>()
            + h.above
    };
    // Only the decades where some candidate is neither at 100% nor at 0.
    let informative = |e: i32| {
        cands.iter().any(|k| {
            let a = above(k, e);
            a > 0 && a < k.c.positions
        })
    };
    let first = (e0..e1).find(|&e| informative(e)).unwrap_or(e0);
    let last = (e0..e1).rev().find(|&e| informative(e)).unwrap_or(e1 - 1);
    for e in first..=(last + 1).min(e1) {
        let _ = write!(
            s,
            r#"<tr><th class="n">{} {}</th>"#,
            decade_label(e),
            r.units
        );
        for k in cands {
            let a = above(k, e);
            let n = k.c.positions.max(1) as f64;
            let cell = if a == 0 {
                "0".to_string()
            } else {
                format!("{} <span class=\"ci\">({a})</span>", pct(a as f64 / n))
            };
            let _ = write!(s, r#"<td class="n">{cell}</td>"#);
        }
        s.push_str("</tr>");
    }
    s.push_str(r#"</tbody></table><p class="small">Counts of positions in brackets. A gate on the 99th percentile fails when more than 1% of positions lie above its limit.</p></div>"#);
    s
}

fn legend(svg: &mut Svg, cands: &[Cand], x: f64, y: f64) {
    for (j, k) in cands.iter().enumerate() {
        let yy = y + 14.0 * j as f64;
        let _ = write!(
            svg.s,
            r#"<rect class="key" style="fill:{}" x="{}" y="{}" width="14" height="4"/>"#,
            colour(k.i),
            f(x),
            f(yy - 4.0)
        );
        svg.text(x + 19.0, yy, "start", "label", &k.c.name);
    }
}

fn position_profile(out: &mut String, r: &Report, cands: &[Cand]) {
    let u = r.units;
    if cands.iter().all(|k| k.c.kl_by_position.is_empty()) {
        return;
    }
    let xmax = cands
        .iter()
        .filter_map(|k| k.c.kl_by_position.last().map(|b| b.last + 1))
        .max()
        .unwrap_or(1) as f64;
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for k in cands {
        for b in &k.c.kl_by_position {
            for v in [b.kl_p50, b.kl_p90, b.kl_mean] {
                if v > 0.0 && v.is_finite() {
                    lo = lo.min(v);
                    hi = hi.max(v);
                }
            }
        }
    }
    let (e0, e1) = if lo.is_finite() {
        (
            lo.log10().floor() as i32,
            (hi.log10().ceil() as i32).max(lo.log10().floor() as i32 + 1),
        )
    } else {
        (-6, 0)
    };
    let (x0, x1, y0, y1) = (ML, W - MR, H - MB, MT);
    let sx = Scale::lin(0.0, xmax, x0, x1);
    let sy = Scale::log(e0 as f64, e1 as f64, y0, y1);
    let xstep = nice_step(xmax, 5.0).max(1.0);
    out.push_str(r#"<section id="position"><h2>kl along the prompt</h2><p class="lead">Does the candidate drift further from the reference as the context grows? Positions are binned by their index within the prompt (single positions up to 15, then eight bins per doubling). Line: mean kl of the bin; band: median to 90th percentile (read from a histogram with ten bins per factor of ten, so within about 25%); dashed: the overall mean. Shared axes.</p><div class="panels">"#);
    for k in cands {
        let c = k.c;
        let mut svg = Svg::new(&format!("kl by position, {}", c.name), H);
        svg.text(x0, 18.0, "start", "ptitle", &c.name);
        frame(&mut svg, x0, y0, x1, y1);
        let mut t = 0.0;
        while t <= xmax + 1e-9 {
            let x = sx.at(t);
            svg.line(x, y0, x, y1, "grid");
            svg.text(x, y0 + 14.0, "middle", "tick", &format!("{t:.0}"));
            t += xstep;
        }
        svg.text(
            (x0 + x1) / 2.0,
            y0 + 31.0,
            "middle",
            "axis",
            "position in the prompt",
        );
        for e in e0..=e1 {
            let y = sy.at(10f64.powi(e));
            svg.line(x0, y, x1, y, "grid");
            svg.text(x0 - 5.0, y + 3.5, "end", "tick", &decade_label(e));
        }
        svg.text(
            12.0,
            (y0 + y1) / 2.0,
            "middle",
            "axis vert",
            &format!("kl ({u})"),
        );
        let _ = write!(svg.s, "<g style=\"fill:{}\">", pale(k.i));
        for b in &c.kl_by_position {
            let (xa, xb) = (sx.at(b.first as f64), sx.at(b.last as f64 + 1.0));
            let (ya, yb) = (sy.at(b.kl_p90), sy.at(b.kl_p50));
            let _ = write!(
                svg.s,
                r#"<rect class="band" x="{}" y="{}" width="{}" height="{}"><title>positions {}–{}: {} positions, mean {}, median ≈ {}, 90th percentile ≈ {}, top-1 agreement {}</title></rect>"#,
                f(xa),
                f(ya.min(yb)),
                f((xb - xa).max(0.5)),
                f((yb - ya).abs().max(0.5)),
                b.first,
                b.last,
                b.positions,
                esc(&num(b.kl_mean)),
                esc(&num(b.kl_p50)),
                esc(&num(b.kl_p90)),
                pct(b.top1_agree)
            );
        }
        svg.raw("</g>");
        let ym = sy.at(c.kl.mean);
        if c.kl.mean > 0.0 && c.kl.mean.is_finite() {
            svg.line(x0, ym, x1, ym, "overall");
        }
        let mut d = String::new();
        for b in &c.kl_by_position {
            if !(b.kl_mean > 0.0 && b.kl_mean.is_finite()) {
                continue;
            }
            let y = sy.at(b.kl_mean);
            let _ = write!(
                d,
                "{}{} {}L{} {}",
                if d.is_empty() { "M" } else { "L" },
                f(sx.at(b.first as f64)),
                f(y),
                f(sx.at(b.last as f64 + 1.0)),
                f(y)
            );
        }
        let _ = write!(
            svg.s,
            r#"<path class="meanline" style="stroke:{}" d="{d}"/>"#,
            colour(k.i)
        );
        out.push_str(&svg.finish());
    }
    out.push_str("</div></section>");
}

fn estimators(out: &mut String, r: &Report, cands: &[Cand]) {
    if cands.iter().all(|k| k.c.estimators.is_empty()) {
        return;
    }
    let u = r.units;
    out.push_str(r#"<section id="estimators"><h2>Sampled estimators against the exact value</h2><p class="lead">What monitoring would see if it kept only the log-probabilities of a few tokens drawn from the reference per position, instead of full logits. Each mark is the estimate of the mean forward kl divided by the exact mean on the same positions (1 = exact), with its 95% interval across positions; k1 and k3 are unbiased, k2 is not. Shared axes.</p><div class="panels">"#);
    // Shared y range over every forward block.
    let mut lo = 1f64;
    let mut hi = 1f64;
    let budgets: Vec<usize> = {
        let mut b: Vec<usize> = cands
            .iter()
            .flat_map(|k| k.c.estimators.iter().map(|e| e.samples_per_position))
            .collect();
        b.sort_unstable();
        b.dedup();
        b
    };
    let ratio =
        |e: &super::EstimatorBlock, k: &crate::estimators::KSummary| -> Option<(f64, f64, f64)> {
            if !(e.exact_mean > 0.0) || e.positions == 0 {
                return None;
            }
            let r = k.mean / e.exact_mean;
            let h = crate::stats::Z95 * k.std / (e.positions as f64).sqrt() / e.exact_mean;
            Some((r, r - h, r + h))
        };
    for k in cands {
        for e in k.c.estimators.iter().filter(|e| e.direction == "forward") {
            for ks in [&e.k1, &e.k2, &e.k3] {
                if let Some((_, a, b)) = ratio(e, ks) {
                    if a.is_finite() && b.is_finite() {
                        lo = lo.min(a);
                        hi = hi.max(b);
                    }
                }
            }
        }
    }
    let pad = 0.08 * (hi - lo).max(0.1);
    let step = nice_step(hi - lo + 2.0 * pad, 5.0);
    let (lo, hi) = (
        ((lo - pad) / step).floor() * step,
        ((hi + pad) / step).ceil() * step,
    );
    let (x0, x1, y0, y1) = (ML, W - MR, H - MB, MT);
    let sy = Scale::lin(lo, hi, y0, y1);
    let nb = budgets.len().max(1) as f64;
    let band = (x1 - x0) / nb;
    for k in cands {
        let c = k.c;
        let mut svg = Svg::new(&format!("estimators, {}", c.name), H);
        svg.text(x0, 18.0, "start", "ptitle", &c.name);
        frame(&mut svg, x0, y0, x1, y1);
        let mut t = lo;
        while t <= hi + 1e-9 {
            let y = sy.at(t);
            svg.line(
                x0,
                y,
                x1,
                y,
                if (t - 1.0).abs() < 1e-9 {
                    "zero"
                } else {
                    "grid"
                },
            );
            svg.text(x0 - 5.0, y + 3.5, "end", "tick", &trim_pct(t).to_string());
            t += step;
        }
        svg.text(
            12.0,
            (y0 + y1) / 2.0,
            "middle",
            "axis vert",
            "estimate / exact",
        );
        svg.text(
            (x0 + x1) / 2.0,
            y0 + 31.0,
            "middle",
            "axis",
            "tokens drawn per position",
        );
        for (bi, &n) in budgets.iter().enumerate() {
            let cx = x0 + band * (bi as f64 + 0.5);
            svg.text(cx, y0 + 14.0, "middle", "tick", &n.to_string());
            let Some(e) = c
                .estimators
                .iter()
                .find(|e| e.direction == "forward" && e.samples_per_position == n)
            else {
                continue;
            };
            for (j, (name, ks)) in [("k1", &e.k1), ("k2", &e.k2), ("k3", &e.k3)]
                .into_iter()
                .enumerate()
            {
                let Some((rv, a, b)) = ratio(e, ks) else {
                    continue;
                };
                let x = cx + (j as f64 - 1.0) * band * 0.22;
                let _ = write!(
                    svg.s,
                    r#"<path class="whisk" d="M{} {}V{}M{} {}H{}M{} {}H{}"/>"#,
                    f(x),
                    f(sy.at(a)),
                    f(sy.at(b)),
                    f(x - 4.0),
                    f(sy.at(a)),
                    f(x + 4.0),
                    f(x - 4.0),
                    f(sy.at(b)),
                    f(x + 4.0)
                );
                let y = sy.at(rv);
                let tip = format!(
                    "{name}, {n} per position: mean {} vs exact {} {u}; bias {}; per-position spread {}; about {} positions for ±10%",
                    num(ks.mean),
                    num(e.exact_mean),
                    num(ks.bias),
                    num(ks.std),
                    num(ks.positions_for_10pct)
                );
                let shape = match j {
                    0 => format!(
                        r#"<circle class="est" style="fill:{}" cx="{}" cy="{}" r="4.5">"#,
                        colour(k.i),
                        f(x),
                        f(y)
                    ),
                    1 => format!(
                        r#"<rect class="est hollow" style="stroke:{}" x="{}" y="{}" width="8" height="8">"#,
                        colour(k.i),
                        f(x - 4.0),
                        f(y - 4.0)
                    ),
                    _ => format!(
                        r#"<path class="est" style="fill:{}" d="M{} {}l5 5l-5 5l-5 -5z">"#,
                        colour(k.i),
                        f(x),
                        f(y - 5.0)
                    ),
                };
                svg.raw(&shape);
                let _ = write!(svg.s, "<title>{}</title>", esc(&tip));
                svg.raw(match j {
                    0 => "</circle>",
                    1 => "</rect>",
                    _ => "</path>",
                });
                svg.text(x, y1 + 12.0, "middle", "sublabel", name);
            }
        }
        out.push_str(&svg.finish());
    }
    out.push_str("</div>");
    // The table, both directions: one row per block, one column per k.
    out.push_str(r#"<details class="plain"><summary>All estimator numbers (both directions)</summary><table class="data est"><thead><tr><th>candidate</th><th>direction</th><th>draws per position</th><th>exact mean</th><th>k1</th><th>k2</th><th>k3</th></tr></thead><tbody>"#);
    for k in cands {
        for e in &k.c.estimators {
            let _ = write!(
                out,
                r#"<tr><td><span class="swatch" style="--c:{}"></span>{}</td><td>{}</td><td class="n">{}</td><td class="n">{}</td>"#,
                colour(k.i),
                esc(&k.c.name),
                if e.direction == "forward" {
                    "forward, x ~ reference"
                } else {
                    "reverse, x ~ candidate"
                },
                e.samples_per_position,
                num(e.exact_mean)
            );
            for ks in [&e.k1, &e.k2, &e.k3] {
                let need = if ks.positions_for_10pct.is_finite() {
                    format!("{:.0}", ks.positions_for_10pct)
                } else {
                    "–".into()
                };
                let _ = write!(
                    out,
                    r#"<td class="n"><b>{}</b><div class="ci">bias {} · spread {} · rmse {}</div><div class="ci">±10% needs {need} positions</div></td>"#,
                    num(ks.mean),
                    num(ks.bias),
                    num(ks.std),
                    num(ks.rmse)
                );
            }
            out.push_str("</tr>");
        }
    }
    out.push_str(r#"</tbody></table><p class="small">Spread: standard deviation of one position's estimate across positions. rmse: root mean square of (estimate − exact) per position. The reverse direction estimates KL(candidate ‖ reference) from tokens drawn from the candidate.</p></details>"#);
    if let Some(c) = cands.first() {
        let s = &c.c.sampling_cost;
        let per: Vec<String> = s
            .sampled_bytes_per_position
            .iter()
            .map(|(n, b)| format!("{b} bytes for {n} draw{}", if *n == 1 { "" } else { "s" }))
            .collect();
        let _ = write!(
            out,
            r#"<p class="small">Storage per position: full logits of both models take {} bytes; sampled logging takes {}.</p>"#,
            s.full_logit_bytes_per_position,
            per.join(", ")
        );
    }
    out.push_str("</section>");
}

/// A token as a chip; spaces stay visible.
fn chip(text: Option<&str>, id: u32, class: &str) -> String {
    match text {
        Some(t) => format!(
            r#"<span class="tok {class}" title="id {id}">{}</span>"#,
            esc(&t.replace(' ', "␣"))
        ),
        None => format!(r#"<span class="tok {class} id">#{id}</span>"#),
    }
}

fn top_list(t: &[TokenProb], other: &[TokenProb]) -> String {
    let mut s = String::from(r#"<div class="tops">"#);
    for x in t {
        let shared = other.first().is_some_and(|o| o.id == x.id);
        let _ = write!(
            s,
            r#"<div class="topr">{}<span class="pbar"><span style="width:{:.1}%"></span></span><span class="p">{:.3}</span></div>"#,
            chip(x.text.as_deref(), x.id, if shared { "same" } else { "" }),
            (100.0 * x.p).clamp(0.0, 100.0),
            x.p
        );
    }
    s.push_str("</div>");
    s
}

fn worst_positions(out: &mut String, c: &CandidateReport, units: &str) {
    if c.worst_positions.is_empty() {
        return;
    }
    let _ = write!(
        out,
        r#"<h4>The {} positions with the highest kl</h4><table class="data worst"><thead><tr><th>kl ({units})</th><th>where</th><th>context and next token</th><th>reference: top 5</th><th>candidate: top 5</th></tr></thead><tbody>"#,
        c.worst_positions.len()
    );
    for w in &c.worst_positions {
        out.push_str(&worst_row(w));
    }
    out.push_str("</tbody></table>");
}

fn worst_row(w: &WorstPositionReport) -> String {
    let mut ctx = String::new();
    match &w.context {
        Some(toks) => {
            ctx.push_str(r#"<span class="ctx">"#);
            if toks.is_empty() {
                ctx.push_str(r#"<span class="small">(start of prompt)</span>"#);
            }
            for t in toks {
                let _ = write!(
                    ctx,
                    r#"<span class="tok">{}</span>"#,
                    esc(&t.replace(' ', "␣"))
                );
            }
            ctx.push_str("</span>");
        }
        None => ctx.push_str(r#"<span class="small">–</span>"#),
    }
    if let Some(t) = w.target {
        let _ = write!(
            ctx,
            r#" <span class="arrow">→</span> {}"#,
            chip(w.target_text.as_deref(), t as u32, "target")
        );
    }
    format!(
        r#"<tr><td class="n"><b>{}</b></td><td class="where">prompt {}<br>position {}<br><span class="small">row {}</span></td><td>{ctx}</td><td>{}</td><td>{}</td></tr>"#,
        num(w.kl),
        w.prompt,
        w.position,
        w.row,
        top_list(&w.ref_top, &w.cand_top),
        top_list(&w.cand_top, &w.ref_top)
    )
}

fn worst_prompts(out: &mut String, c: &CandidateReport, units: &str, i: usize) {
    if c.worst_prompts.is_empty() {
        return;
    }
    let top = c
        .worst_prompts
        .iter()
        .map(|p| p.kl_max)
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max);
    let lo = c.kl.p50.max(top * 1e-4);
    let sc = |v: f64| -> f64 {
        if !(v > 0.0) || !(top > lo) {
            return 0.0;
        }
        (100.0 * (v / lo).log10() / (top / lo).log10()).clamp(0.0, 100.0)
    };
    let _ = write!(
        out,
        r#"<h4>Prompts with the highest mean kl</h4><table class="data prompts"><thead><tr><th>prompt</th><th>positions</th><th>mean kl</th><th>largest kl</th><th class="wide">mean ▮ and largest ┃ (log scale, from the overall median {} up)</th></tr></thead><tbody>"#,
        num(lo)
    );
    for p in &c.worst_prompts {
        let _ = write!(
            out,
            r#"<tr><td class="n">{}</td><td class="n">{}</td><td class="n">{}</td><td class="n">{}</td><td><span class="pbar wide" style="--c:{}"><span style="width:{:.1}%"></span><i style="left:{:.1}%"></i></span></td></tr>"#,
            p.prompt,
            p.positions,
            num(p.kl_mean),
            num(p.kl_max),
            colour(i),
            sc(p.kl_mean),
            sc(p.kl_max)
        );
    }
    let _ = units;
    out.push_str("</tbody></table>");
}

fn worst(out: &mut String, r: &Report, cands: &[Cand]) {
    out.push_str(r#"<section id="worst"><h2>Where it hurts most</h2><p class="lead">Highest-kl positions with what each model would say next, and the prompts with the highest mean kl. An outlined token is the other model's first choice; ␣ marks a space.</p>"#);
    // The candidate with the highest mean kl is open, the others folded.
    let worst_one = r.ranking.last().map(|e| e.candidate).unwrap_or(0);
    for k in cands.iter() {
        let _ = write!(
            out,
            r#"<details{}><summary><span class="swatch" style="--c:{}"></span>{} <span class="small">— {} positions listed, {} prompts</span></summary>"#,
            if k.i == worst_one { " open" } else { "" },
            colour(k.i),
            esc(&k.c.name),
            k.c.worst_positions.len(),
            k.c.worst_prompts.len()
        );
        worst_prompts(out, k.c, r.units, k.i);
        worst_positions(out, k.c, r.units);
        out.push_str("</details>");
    }
    out.push_str("</section>");
}

fn warnings(out: &mut String, cands: &[Cand]) {
    out.push_str(r#"<section id="warnings"><h2>Warnings</h2>"#);
    let mut any = false;
    for k in cands {
        if k.c.warnings.is_empty() && k.c.skipped.is_empty() {
            continue;
        }
        any = true;
        let _ = write!(
            out,
            r#"<div class="warnbox" style="--c:{}"><b>{}</b><ul>"#,
            colour(k.i),
            esc(&k.c.name)
        );
        for w in &k.c.warnings {
            let _ = write!(out, "<li>{}</li>", esc(w));
        }
        out.push_str("</ul>");
        if !k.c.skipped.is_empty() {
            out.push_str(r#"<table class="data skipped"><thead><tr><th>row</th><th>prompt</th><th>position</th><th>file</th><th>problem</th></tr></thead><tbody>"#);
            for s in k.c.skipped.iter().take(50) {
                let _ = write!(
                    out,
                    r#"<tr><td class="n">{}</td><td class="n">{}</td><td class="n">{}</td><td>{}</td><td>{}</td></tr>"#,
                    s.row,
                    s.prompt,
                    s.position,
                    esc(&s.file),
                    esc(&s.fault)
                );
            }
            out.push_str("</tbody></table>");
            if k.c.skipped.len() > 50 {
                let _ = write!(
                    out,
                    r#"<p class="small">… and {} more in the JSON report.</p>"#,
                    k.c.skipped.len() - 50
                );
            }
        }
        out.push_str("</div>");
    }
    if !any {
        out.push_str(r#"<p class="lead">None.</p>"#);
    }
    out.push_str("</section>");
}

const STYLE: &str = r#"
:root{--ink:#1d2430;--soft:#5b6472;--line:#d9d4ca;--paper:#fbfaf6;--card:#ffffff;--ok:#2e7d43;--bad:#b3261e;--warn:#a86a12}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,Ubuntu,sans-serif}
main{max-width:1180px;margin:0 auto;padding:28px 28px 60px}
header{border-bottom:3px solid var(--ink);padding-bottom:12px;margin-bottom:8px}
header h1{font-size:26px;margin:0 0 4px;letter-spacing:-.01em}
header .sub{color:var(--soft);margin:0;font-size:14px}
nav{display:flex;gap:16px;flex-wrap:wrap;font-size:13px;margin:10px 0 0}
nav a{color:var(--soft);text-decoration:none;border-bottom:1px dotted var(--soft)}
h2{font-size:19px;margin:34px 0 6px;padding-top:6px;border-top:1px solid var(--line)}
h3{font-size:16px;margin:22px 0 4px}
h4{font-size:14px;margin:18px 0 6px;color:var(--soft);text-transform:uppercase;letter-spacing:.04em}
.lead{color:var(--soft);margin:0 0 12px;max-width:80ch}
.small{font-size:12.5px;color:var(--soft)}
.notice{font-size:13px;color:var(--soft);border-left:3px solid var(--line);padding-left:10px;max-width:90ch}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(340px,1fr));gap:14px}
.card{background:var(--card);border:1px solid var(--line);border-top:5px solid var(--c);border-radius:6px;padding:12px 14px}
.cardhead{display:flex;align-items:baseline;gap:8px;flex-wrap:wrap}
.cardhead b{font-size:17px}
.file{color:var(--soft);font-size:12px;word-break:break-all}
.big{font-size:21px;font-weight:700;margin:6px 0 8px;text-transform:uppercase;letter-spacing:.03em}
.card.pass .big{color:var(--ok)}.card.fail .big{color:var(--bad)}.card.none .big{color:var(--soft)}
.gates{border-collapse:collapse;width:100%}
.gates td{padding:5px 6px 5px 0;vertical-align:top;border-top:1px solid #eee;font-size:13.5px}
.gates .val{color:var(--soft);font-size:12.5px;font-variant-numeric:tabular-nums}
.unsure{color:var(--warn);font-size:12.5px;font-weight:600}
.ok,.bad{display:inline-block;min-width:38px;text-align:center;font-size:11.5px;font-weight:700;text-transform:uppercase;border-radius:3px;padding:1px 5px;color:#fff}
.ok{background:var(--ok)}.bad{background:var(--bad)}
.swatch{display:inline-block;width:11px;height:11px;border-radius:2px;background:var(--c);margin-right:6px;vertical-align:-1px}
.strip{width:190px;height:22px;display:block}
.strip .failside{fill:#f6dedb}.strip .stripaxis{stroke:#999;stroke-width:1}.strip .whisker{stroke:var(--ink);stroke-width:1.4;fill:none}
.strip .limit{stroke:var(--bad);stroke-width:2}.strip .dot{stroke:#fff;stroke-width:1.5}.dot.pass{fill:var(--ok)}.dot.fail{fill:var(--bad)}
table.data{border-collapse:collapse;width:100%;background:var(--card);border:1px solid var(--line);font-size:13.5px}
table.data th,table.data td{padding:6px 9px;border-bottom:1px solid #ece8df;text-align:left;vertical-align:top}
table.data thead th{background:#f2efe7;font-size:12.5px;font-weight:600;color:var(--soft)}
table.summary tbody th{font-weight:500;color:var(--soft);width:30%}
td.n{font-variant-numeric:tabular-nums;white-space:nowrap}
.ci{color:var(--soft);font-size:12px;font-weight:400}
tr.grp td{border-top:2px solid #e2ddd2}
.panels{display:grid;grid-template-columns:repeat(auto-fit,minmax(440px,1fr));gap:12px;margin:6px 0 10px}
.side{min-width:0}.side h4{margin-top:4px}
svg.pairs{max-width:860px;display:block}
details.plain{background:transparent;border:none;padding:0}details.plain summary{font-weight:600;font-size:14px;color:var(--soft)}
svg.plot{width:100%;height:auto;background:var(--card);border:1px solid var(--line);border-radius:4px}
svg text{font-family:inherit;fill:var(--ink)}
.ptitle{font-size:13px;font-weight:700}
.tick{font-size:10px;fill:var(--soft)}.tick.cum{fill:#888}
.axis{font-size:11px;fill:var(--soft)}.axis.vert{transform-box:fill-box;transform-origin:center;transform:rotate(-90deg)}
.label{font-size:11px}.sublabel{font-size:9.5px;fill:var(--soft)}
.note{font-size:10px;fill:var(--bad)}
.mlabel{font-size:9.5px;fill:var(--ink)}.mlabel.lim{fill:var(--bad)}
.frame{fill:none;stroke:#bdb6a8;stroke-width:1}
.grid{stroke:#ece8df;stroke-width:1}.tickmark{stroke:#999}
.zero{stroke:#777;stroke-width:1.2;stroke-dasharray:4 3}
.floor{fill:#e7e4de}
.bar{stroke:none}
.cumline,.tailline,.meanline{fill:none;stroke-width:2;stroke-linejoin:round}
.tailline{stroke-width:2.2}
.mark{stroke:var(--ink);stroke-width:1.2}.mark.dash{stroke-dasharray:5 3}
.limit{stroke:var(--bad);stroke-width:1.6;stroke-dasharray:2 2}
.p99line{stroke:#999;stroke-width:1;stroke-dasharray:6 3}
.overall{stroke:#888;stroke-width:1;stroke-dasharray:5 4}
.band{stroke:none;opacity:.9}
.whisk{stroke:var(--ink);stroke-width:1.3;fill:none}
.pt{fill:var(--ink)}
.est{stroke:#fff;stroke-width:1}.est.hollow{fill:#fff;stroke-width:2}
.key{stroke:none}
.tok{display:inline-block;font:12.5px/1.3 ui-monospace,"SF Mono",Menlo,Consolas,monospace;background:#f1eee6;border:1px solid #e0dbcf;border-radius:3px;padding:0 4px;margin:1px 1px;white-space:pre}
.tok.target{background:#fff4d6;border-color:#e4c77a;font-weight:700}
.tok.same{border-color:var(--ink)}
.tok.id{color:var(--soft)}
.ctx .tok{background:transparent;border-color:transparent;padding:0 1px}
.arrow{color:var(--soft)}
.tops{display:grid;gap:2px;min-width:210px}
.topr{display:grid;grid-template-columns:minmax(80px,auto) 1fr 44px;gap:6px;align-items:center}
.pbar{display:block;height:7px;background:#eeeae1;border-radius:2px;position:relative;min-width:50px}
.pbar span{display:block;height:7px;background:#8c95a3;border-radius:2px}
.pbar.wide{min-width:220px;height:10px}.pbar.wide span{height:10px;background:var(--c);opacity:.75}
.pbar.wide i{position:absolute;top:-3px;width:2px;height:16px;background:var(--ink)}
.p{font-size:12px;font-variant-numeric:tabular-nums;color:var(--soft);text-align:right}
td.where{white-space:nowrap;font-size:12.5px}
th.wide{width:40%}
details{background:var(--card);border:1px solid var(--line);border-radius:6px;padding:8px 14px;margin:10px 0}
summary{cursor:pointer;font-weight:700;font-size:15px}
.warnbox{background:#fff8ec;border:1px solid #ecd6ae;border-left:5px solid var(--warn);border-radius:4px;padding:8px 14px;margin:8px 0}
.warnbox ul{margin:6px 0;padding-left:20px}
footer{margin-top:40px;border-top:1px solid var(--line);padding-top:10px;font-size:12.5px;color:var(--soft)}
@media print{details{break-inside:avoid}}
"#;

/// Counts what rendered, for automated checks: resources fetched (must be
/// none), script errors and plot marks, written onto <body> as attributes.
const SCRIPT: &str = r#"
(function(){var errs=0;window.addEventListener('error',function(){errs++;},true);
window.addEventListener('load',function(){var b=document.body;
var res=(performance.getEntriesByType?performance.getEntriesByType('resource').length:0);
b.setAttribute('data-resources',String(res));b.setAttribute('data-errors',String(errs));
b.setAttribute('data-plots',String(document.querySelectorAll('svg.plot').length));
b.setAttribute('data-marks',String(document.querySelectorAll('svg path,svg rect,svg circle').length));
b.setAttribute('data-check','done');});})();
"#;

/// The whole page as a string.
pub fn render(r: &Report) -> String {
    let cands: Vec<Cand> = r
        .candidates
        .iter()
        .enumerate()
        .map(|(i, c)| Cand { i, c })
        .collect();
    let refname = r
        .reference
        .model
        .clone()
        .unwrap_or_else(|| r.reference.path.clone());
    let mut out = String::with_capacity(256 * 1024);
    out.push_str("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"/><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"/>");
    let _ = write!(
        out,
        "<title>klgauge: {} against {} candidate{}</title>",
        esc(&refname),
        cands.len(),
        if cands.len() == 1 { "" } else { "s" }
    );
    // The check script goes first, so that its error listener sees everything.
    let _ = write!(
        out,
        "<style>{STYLE}</style><script>{SCRIPT}</script></head><body data-check=\"pending\"><main>"
    );
    let names: Vec<String> = cands
        .iter()
        .map(|k| {
            format!(
                r#"<span class="swatch" style="--c:{}"></span>{}"#,
                colour(k.i),
                esc(&k.c.name)
            )
        })
        .collect();
    let _ = write!(
        out,
        r##"<header><h1>How far the candidates moved from {}</h1><p class="sub">{} · {} prompts, {} rows · divergences in {}</p><p class="sub">{}</p><nav><a href="#verdict">verdict</a>{}<a href="#summary">summary</a><a href="#distribution">distribution</a><a href="#position">along the prompt</a><a href="#estimators">estimators</a><a href="#worst">worst positions</a><a href="#warnings">warnings</a></nav></header>"##,
        esc(&refname),
        esc(&r.reference.path),
        r.reference.prompts,
        r.reference.rows,
        r.units,
        names.join(" &nbsp; "),
        if r.ranking.len() > 1 {
            r##"<a href="#ranking">ranking</a>"##
        } else {
            ""
        }
    );
    verdict_cards(&mut out, r, &cands);
    ranking(&mut out, r);
    summary(&mut out, r, &cands);
    distribution(&mut out, r, &cands);
    position_profile(&mut out, r, &cands);
    estimators(&mut out, r, &cands);
    worst(&mut out, r, &cands);
    warnings(&mut out, &cands);
    let _ = write!(
        out,
        r#"<footer><p>{}</p><p>Made by {} {}. Draws per position: {}; seed {}; worst positions kept: {}. Exact pass: {:.2} s ({:.0} rows/s). This page is one file and loads nothing from anywhere.</p></footer></main></body></html>"#,
        esc(r.notice),
        r.tool.name,
        r.tool.version,
        r.settings
            .samples
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>()
            .join(", "),
        r.settings.seed,
        r.settings.top,
        r.timing.exact_pass_seconds,
        r.timing.rows_per_second
    );
    out.push('\n');
    out
}

impl Format for Html {
    fn write(&self, report: &Report, out: &mut dyn Write) -> std::io::Result<()> {
        out.write_all(render(report).as_bytes())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_well() {
        assert_eq!(num(0.0123), "0.0123");
        assert_eq!(num(1.5), "1.50");
        assert_eq!(num(2.5e-5), "2.50×10⁻⁵");
        assert_eq!(num(f64::INFINITY), "∞");
        assert_eq!(esc("<a href=\"x\">&"), "&lt;a href=&quot;x&quot;&gt;&amp;");
    }

    #[test]
    fn log_scale_maps_decades_evenly() {
        let s = Scale::log(-6.0, 0.0, 0.0, 600.0);
        assert!((s.at(1e-3) - 300.0).abs() < 1e-9);
        assert!((s.at(1.0) - 600.0).abs() < 1e-9);
    }
}
