//! `klgauge demo`: an invented scenario, generated from nothing but this file.
//!
//! The fictional Fenmarrow Computing Guild has trained "Wren-7" and made two
//! smaller variants of it, "Wren-7 int8" and "Wren-7 int4". Their engineer
//! ran all three over a set of 48 prompts and kept the logits. Everything here
//! is synthetic: the logits are drawn from a Zipf-like distribution whose
//! shape depends on the prompt and on the previous token, the variants add
//! noise of their own size (growing with the position for the 4-bit one, as
//! quantisation error tends to accumulate over a long context), and in eight
//! number-heavy prompts the 4-bit variant falls into a repetition loop near
//! the end.
//! One row of the 4-bit dump holds a NaN, as a glitch in a dump would.
//!
//! The demo writes the three logit files, a tiny tokenizer.json, and then
//! runs `compare` with gates, writing every report format beside them. With
//! the default gates the int8 variant passes and the int4 variant fails its
//! tail gate (p99), which is the point of the scenario: its mean kl alone
//! stays under its limit (with an uncertain verdict), and only the tail shows
//! the prompts where it breaks down. The demo itself exits 0 when everything was written; the
//! `compare` command it prints exits 1 on the same files, as SPEC says.
//!
//! Generation is deterministic: the same bytes on every run and thread count
//! (a counter-based generator keyed by file, prompt, position and column).

use crate::commands::compare::{compare, CompareArgs, Outcome};
use crate::error::{Error, Result};
use crate::estimators::mix64;
use crate::output::write_atomic;
use crate::report::GateLimits;
use safetensors::{Dtype, View};
use std::borrow::Cow;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

pub const PROMPTS: usize = 48;
pub const LENGTH: usize = 128;
pub const VOCAB: usize = 512;
/// Prompts in which the 4-bit variant falls into a loop (the number-heavy
/// ones: timetables, ledgers, tables), and the position where it starts.
pub const BROKEN_PROMPTS: [usize; 8] = [0, 6, 11, 18, 25, 26, 33, 41];
pub const BREAK_AT: usize = 104;
/// The row of the 4-bit file that holds a NaN (prompt 37, position 17).
pub const NAN_ROW: usize = 37 * LENGTH + 17;

pub const REFERENCE_FILE: &str = "wren-7.safetensors";
pub const INT8_FILE: &str = "wren-7-int8.safetensors";
pub const INT4_FILE: &str = "wren-7-int4.safetensors";
pub const TOKENIZER_FILE: &str = "tokenizer.json";

/// The demo's gates, in nats.
pub const GATES: GateLimits = GateLimits {
    max_kl_mean: Some(0.05),
    max_kl_p99: Some(0.3),
    min_top1: Some(0.86),
};

/// The invented prompt set: what the 48 prompts were meant to be about.
pub const PROMPT_TITLES: [&str; PROMPTS] = [
    "ferry timetable for the Oskel isles",
    "a letter to the Tarrow weir keeper",
    "recipe: smoked barley loaf",
    "minutes of the Fenmarrow guild meeting",
    "how to re-string a hollow lute",
    "the legend of the copper heron",
    "tide tables, spring quarter",
    "a complaint about lantern oil prices",
    "field notes on marsh orchids",
    "instructions for the counting engine",
    "a children's rhyme about wrens",
    "salt road trade ledger",
    "weather report for Duneholt",
    "a sermon on patience",
    "the rules of tile-stones",
    "an apprentice's first week",
    "treatise on river locks",
    "a farewell toast",
    "census of the Quell valley",
    "how bees choose a hollow",
    "a dispute over a boundary hedge",
    "glossary of rope knots",
    "the wool market in autumn",
    "a guide to reading star charts",
    "notes for the bell ringers",
    "an inventory of the east granary",
    "proof that the guild's sums balance",
    "a poem about fog",
    "repairing a cracked kiln",
    "the history of the Ebbing bridge",
    "a traveller's phrasebook",
    "the care of carthorses",
    "letters between two cartographers",
    "a list of ferry fares",
    "the festival of first light",
    "how to brew juniper ale",
    "a town-hall seating plan",
    "rules for the night watch",
    "the mill-pond survey",
    "a merchant's travel diary",
    "a report on the flood of the Sallow",
    "the guild's table of logarithms",
    "notes on mending fishing nets",
    "a quarrel between two bakers",
    "the almanac of the long winter",
    "a guide to hedgerow berries",
    "building a dry-stone wall",
    "the closing speech of the fair",
];

/// The files one demo run produced.
#[derive(Debug, Clone)]
pub struct DemoFiles {
    pub dir: PathBuf,
    pub reference: PathBuf,
    pub int8: PathBuf,
    pub int4: PathBuf,
    pub tokenizer: PathBuf,
}

/// Uniform in (0, 1) from a key.
#[inline]
fn unit(key: u64) -> f64 {
    ((mix64(key) >> 11) as f64 + 0.5) * (1.0 / (1u64 << 53) as f64)
}

#[inline]
fn key(a: u64, b: u64, c: u64, d: u64) -> u64 {
    mix64(mix64(mix64(mix64(a) ^ b) ^ c) ^ d)
}

/// Standard normal by Box-Muller from two keyed uniforms.
#[inline]
fn normal(k: u64) -> f64 {
    let (u, v) = (unit(k), unit(k ^ 0xA5A5_5A5A_0F0F_F0F0));
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

const STREAM_REF: u64 = 1;
const STREAM_TARGET: u64 = 2;
const STREAM_INT8: u64 = 3;
const STREAM_INT4: u64 = 4;

/// Reference logits of one position: a Zipf-like shape over a random ranking
/// that depends on the previous token, sharpened or flattened per position,
/// with the prompt's theme tokens favoured.
fn reference_row(prompt: usize, position: usize, prev: u32, out: &mut [f64]) {
    let h = key(STREAM_REF, prompt as u64, position as u64, prev as u64);
    // Exponent of the rank law: 1.1 (flat, uncertain) .. 2.3 (peaked).
    let s = 1.1 + 1.2 * unit(h ^ 7);
    let theme = (prompt % 16) as u32;
    for (v, o) in out.iter_mut().enumerate() {
        let v = v as u32;
        // A continuous random rank in [1, VOCAB]: the ranking follows the
        // previous token (so the stream has some grammar) ...
        let r = 1.0 + (VOCAB as f64 - 1.0) * unit(key(STREAM_REF, prev as u64, v as u64, 99));
        let mut x = -s * r.ln();
        // ... and the prompt's theme is favoured.
        if v % 16 == theme && v >= 64 {
            x += 1.0;
        }
        // Special tokens (ids 0..4) are never predicted.
        if v < 4 {
            x -= 30.0;
        }
        // Raw logits sit around a positive offset, as real ones do.
        *o = 11.0 + x + 0.3 * normal(h ^ (v as u64) << 20);
    }
}

/// Draws a token from softmax(x) with a keyed uniform.
fn draw(x: &[f64], u: f64) -> u32 {
    let m = x.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let total: f64 = x.iter().map(|&v| (v - m).exp()).sum();
    let mut acc = 0.0;
    let goal = u * total;
    for (i, &v) in x.iter().enumerate() {
        acc += (v - m).exp();
        if acc > goal {
            return i as u32;
        }
    }
    (x.len() - 1) as u32
}

/// The three logit tensors and the targets, in row order.
pub struct DemoData {
    pub reference: Vec<f32>,
    pub int8: Vec<half::f16>,
    pub int4: Vec<half::f16>,
    pub targets: Vec<i64>,
}

/// Generates the whole scenario in memory (about 25 MB).
pub fn generate_data() -> DemoData {
    let rows = PROMPTS * LENGTH;
    let mut reference = vec![0f32; rows * VOCAB];
    let mut int8 = vec![half::f16::ZERO; rows * VOCAB];
    let mut int4 = vec![half::f16::ZERO; rows * VOCAB];
    let mut targets = vec![0i64; rows];
    let mut x = vec![0f64; VOCAB];
    let mut y = vec![0f64; VOCAB];
    // The tokens the 4-bit variant loops on in the broken prompts: " the", " the", " of".
    let loop_tokens = [tok::THE, tok::OF];
    for g in 0..PROMPTS {
        // The first input token is the prompt's own opening word.
        let mut prev = (64 + (g * 37) % (VOCAB - 64)) as u32;
        for t in 0..LENGTH {
            let row = g * LENGTH + t;
            reference_row(g, t, prev, &mut x);
            let target = draw(&x, unit(key(STREAM_TARGET, g as u64, t as u64, 0)));
            targets[row] = target as i64;
            let base = row * VOCAB;
            for v in 0..VOCAB {
                reference[base + v] = x[v] as f32;
            }
            // int8: small independent noise; stored centered (raw minus max) in f16.
            let k8 = key(STREAM_INT8, g as u64, t as u64, 0);
            for v in 0..VOCAB {
                y[v] = x[v] + 0.03 * normal(k8 ^ (v as u64) << 24);
            }
            store_centered(&y, &mut int8[base..base + VOCAB]);
            // int4: larger noise that grows along the prompt, plus a shared
            // shift of the theme tokens (a systematic error, not only noise).
            let k4 = key(STREAM_INT4, g as u64, t as u64, 0);
            let sigma = 0.10 * (1.0 + 1.5 * t as f64 / LENGTH as f64);
            for v in 0..VOCAB {
                y[v] = x[v] + sigma * normal(k4 ^ (v as u64) << 24);
            }
            if BROKEN_PROMPTS.contains(&g) && t >= BREAK_AT {
                // The loop takes hold over eight positions.
                let pull = 5.0 * ((t - BREAK_AT + 1) as f64 / 8.0).min(1.0);
                let lt = loop_tokens[t % 2] as usize;
                let top = x.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                y[lt] = y[lt].max(top - 4.0) + pull;
            }
            store_centered(&y, &mut int4[base..base + VOCAB]);
            if row == NAN_ROW {
                int4[base + 5] = half::f16::NAN;
            }
            prev = target;
        }
    }
    DemoData {
        reference,
        int8,
        int4,
        targets,
    }
}

fn store_centered(y: &[f64], out: &mut [half::f16]) {
    let m = y.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    for (o, &v) in out.iter_mut().zip(y) {
        *o = half::f16::from_f64(v - m);
    }
}

/// A tensor for safetensors' serializer.
struct Tensor {
    dtype: Dtype,
    shape: Vec<usize>,
    bytes: Vec<u8>,
}

impl View for &Tensor {
    fn dtype(&self) -> Dtype {
        self.dtype
    }
    fn shape(&self) -> &[usize] {
        &self.shape
    }
    fn data(&self) -> Cow<'_, [u8]> {
        Cow::Borrowed(&self.bytes)
    }
    fn data_len(&self) -> usize {
        self.bytes.len()
    }
}

/// Serializes tensors with metadata into safetensors bytes whose header is
/// the same on every run: the serializer writes the metadata map in hash
/// order, so the header JSON is rewritten with sorted keys (same length,
/// since only the order of the entries changes).
fn safetensors_bytes(tensors: &[(&str, &Tensor)], metadata: &[(&str, &str)]) -> Result<Vec<u8>> {
    let meta: HashMap<String, String> = metadata
        .iter()
        .map(|(k, v)| (k.to_string(), v.to_string()))
        .collect();
    let mut bytes =
        safetensors::serialize(tensors.iter().map(|(n, t)| (n.to_string(), *t)), Some(meta))
            .map_err(|e| Error::usage(format!("demo: cannot serialize: {e}")))?;
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    let header: serde_json::Value = serde_json::from_slice(&bytes[8..8 + n])
        .map_err(|e| Error::usage(format!("demo: bad header: {e}")))?;
    // serde_json's map is ordered by key (no preserve_order feature here).
    let canon =
        serde_json::to_vec(&header).map_err(|e| Error::usage(format!("demo: bad header: {e}")))?;
    if canon.len() > n {
        return Err(Error::usage("demo: header grew when sorted"));
    }
    bytes[8..8 + canon.len()].copy_from_slice(&canon);
    for b in &mut bytes[8 + canon.len()..8 + n] {
        *b = b' ';
    }
    Ok(bytes)
}

fn f16_bytes(v: &[half::f16]) -> Vec<u8> {
    bytemuck::cast_slice(v).to_vec()
}

/// The bytes of every demo file, by file name (for tests of determinism).
pub fn file_bytes() -> Result<Vec<(&'static str, Vec<u8>)>> {
    let d = generate_data();
    let shape = vec![PROMPTS, LENGTH, VOCAB];
    let targets = Tensor {
        dtype: Dtype::I64,
        shape: vec![PROMPTS, LENGTH],
        bytes: bytemuck::cast_slice(&d.targets).to_vec(),
    };
    let r = Tensor {
        dtype: Dtype::F32,
        shape: shape.clone(),
        bytes: bytemuck::cast_slice(&d.reference).to_vec(),
    };
    let q8 = Tensor {
        dtype: Dtype::F16,
        shape: shape.clone(),
        bytes: f16_bytes(&d.int8),
    };
    let q4 = Tensor {
        dtype: Dtype::F16,
        shape,
        bytes: f16_bytes(&d.int4),
    };
    let about = "invented demo data: a fictional model of the fictional Fenmarrow Computing Guild";
    Ok(vec![
        (
            REFERENCE_FILE,
            safetensors_bytes(
                &[("logits", &r), ("targets", &targets)],
                &[
                    ("model", "Wren-7"),
                    ("logits_form", "raw"),
                    ("tokenizer", TOKENIZER_FILE),
                    ("about", about),
                ],
            )?,
        ),
        (
            INT8_FILE,
            safetensors_bytes(
                &[("logits", &q8), ("targets", &targets)],
                &[
                    ("model", "Wren-7 int8"),
                    ("logits_form", "centered"),
                    ("tokenizer", TOKENIZER_FILE),
                    ("about", about),
                ],
            )?,
        ),
        (
            INT4_FILE,
            safetensors_bytes(
                &[("logits", &q4), ("targets", &targets)],
                &[
                    ("model", "Wren-7 int4"),
                    ("logits_form", "centered"),
                    ("tokenizer", TOKENIZER_FILE),
                    ("about", about),
                ],
            )?,
        ),
        (TOKENIZER_FILE, tokenizer_json().into_bytes()),
    ])
}

/// Writes the scenario's files into `dir` (created if missing).
pub fn write_files(dir: &Path) -> Result<DemoFiles> {
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::output(dir, format!("cannot create the directory: {e}")))?;
    for (name, bytes) in file_bytes()? {
        write_atomic(&dir.join(name), |w| w.write_all(&bytes))?;
    }
    Ok(DemoFiles {
        dir: dir.to_path_buf(),
        reference: dir.join(REFERENCE_FILE),
        int8: dir.join(INT8_FILE),
        int4: dir.join(INT4_FILE),
        tokenizer: dir.join(TOKENIZER_FILE),
    })
}

/// The `compare` arguments the demo runs.
pub fn compare_args(f: &DemoFiles) -> CompareArgs {
    CompareArgs {
        reference: f.reference.clone(),
        candidates: vec![f.int8.clone(), f.int4.clone()],
        json: Some(f.dir.join("report.json")),
        csv: Some(f.dir.join("positions.csv")),
        html: Some(f.dir.join("report.html")),
        tokenizer: Some(f.tokenizer.clone()),
        gates: GATES,
        ..CompareArgs::default()
    }
}

/// The command line equivalent to `compare_args`.
pub fn compare_command(f: &DemoFiles) -> String {
    let d = f.dir.display();
    format!(
        "klgauge compare {d}/{REFERENCE_FILE} {d}/{INT8_FILE} {d}/{INT4_FILE} --tokenizer {d}/{TOKENIZER_FILE} \
         --json {d}/report.json --csv {d}/positions.csv --html {d}/report.html \
         --max-kl-mean {} --max-kl-p99 {} --min-top1 {}",
        GATES.max_kl_mean.unwrap(),
        GATES.max_kl_p99.unwrap(),
        GATES.min_top1.unwrap()
    )
}

/// Generates the scenario into `dir` and compares it.
pub fn run(dir: &Path, threads: Option<usize>) -> Result<(DemoFiles, Outcome)> {
    let files = write_files(dir)?;
    let mut args = compare_args(&files);
    args.threads = threads;
    let outcome = compare(&args)?;
    Ok((files, outcome))
}

/// The story told before the report.
pub fn preface() -> String {
    let broken: Vec<String> = BROKEN_PROMPTS
        .iter()
        .map(|&g| format!("      prompt {g:>2}: {}", PROMPT_TITLES[g]))
        .collect();
    format!(
        "An invented scenario: the fictional Fenmarrow Computing Guild compressed its model Wren-7 to 8 and 4 bits\n\
         and kept the logits of all three on {PROMPTS} prompts of {LENGTH} tokens (vocabulary {VOCAB}). The data are synthetic.\n\
         By construction the 4-bit variant\n\
         \x20 - drifts further from the reference the longer the context,\n\
         \x20 - falls into a repetition loop from position {BREAK_AT} of {} number-heavy prompts:\n{}\n\
         \x20 - has one row holding a NaN (row {NAN_ROW}: prompt {}, position {}).\n\
         Gates: mean kl at most {} nats, p99 of kl at most {} nats, top-1 agreement at least {}.\n\n",
        BROKEN_PROMPTS.len(),
        broken.join("\n"),
        NAN_ROW / LENGTH,
        NAN_ROW % LENGTH,
        GATES.max_kl_mean.unwrap(),
        GATES.max_kl_p99.unwrap(),
        GATES.min_top1.unwrap()
    )
}

/// Token ids the generator refers to.
mod tok {
    pub const THE: u32 = 8;
    pub const OF: u32 = 9;
}

/// A tiny invented byte-level vocabulary: 4 special tokens, punctuation and
/// newline, a few hundred words with a leading space marker (U+0120, as in
/// byte-level BPE vocabularies), and word pieces without one.
pub fn vocabulary() -> Vec<String> {
    let sp = '\u{0120}';
    let mut v: Vec<String> = ["<pad>", "<s>", "</s>", "<unk>"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    for p in [".", ",", "\u{010A}", ";"] {
        v.push(p.to_string());
    }
    // ids 8 and 9 are the loop tokens (tok::THE, tok::OF).
    let words = [
        "the",
        "of",
        "and",
        "to",
        "a",
        "in",
        "is",
        "that",
        "for",
        "it",
        "on",
        "was",
        "with",
        "as",
        "by",
        "at",
        "from",
        "or",
        "an",
        "be",
        "this",
        "which",
        "but",
        "not",
        "are",
        "all",
        "were",
        "when",
        "we",
        "there",
        "can",
        "one",
        "their",
        "has",
        "its",
        "river",
        "lantern",
        "ferry",
        "guild",
        "wren",
        "heron",
        "barley",
        "loaf",
        "weir",
        "keeper",
        "tide",
        "marsh",
        "orchid",
        "salt",
        "road",
        "ledger",
        "wool",
        "market",
        "bridge",
        "kiln",
        "mill",
        "pond",
        "granary",
        "bell",
        "hedge",
        "rope",
        "knot",
        "star",
        "chart",
        "fog",
        "winter",
        "almanac",
        "berry",
        "wall",
        "stone",
        "fair",
        "baker",
        "net",
        "flood",
        "sallow",
        "quell",
        "valley",
        "oskel",
        "tarrow",
        "fenmarrow",
        "duneholt",
        "juniper",
        "ale",
        "carthorse",
        "cartographer",
        "merchant",
        "diary",
        "watch",
        "night",
        "festival",
        "light",
        "sermon",
        "patience",
        "tile",
        "apprentice",
        "week",
        "lock",
        "toast",
        "census",
        "bee",
        "hollow",
        "boundary",
        "glossary",
        "autumn",
        "guide",
        "ringer",
        "inventory",
        "sum",
        "poem",
        "history",
        "traveller",
        "phrase",
        "care",
        "letter",
        "fare",
        "brew",
        "seat",
        "plan",
        "rule",
        "survey",
        "report",
        "table",
        "note",
        "quarrel",
        "speech",
        "closing",
        "first",
        "long",
        "east",
        "west",
        "north",
        "south",
        "old",
        "new",
        "small",
        "great",
        "copper",
        "hollow",
        "dry",
        "cracked",
        "smoked",
        "spring",
        "quarter",
        "oil",
        "price",
        "field",
        "engine",
        "count",
        "rhyme",
        "trade",
        "weather",
        "rules",
        "week",
        "lute",
        "string",
        "minutes",
        "meeting",
        "legend",
        "instructions",
        "water",
        "boat",
        "oar",
        "sail",
        "harbour",
        "island",
        "shore",
        "reed",
        "willow",
        "alder",
        "ash",
        "oak",
        "fern",
        "morning",
        "evening",
        "noon",
        "day",
        "year",
        "hour",
        "road",
        "path",
        "gate",
        "door",
        "roof",
        "hearth",
        "fire",
        "bread",
        "salted",
        "fish",
        "eel",
        "pike",
        "trout",
        "grain",
        "flour",
        "honey",
        "wax",
        "candle",
        "lamp",
        "wick",
        "ink",
        "quill",
        "page",
        "book",
        "scroll",
        "map",
        "compass",
        "mile",
        "league",
        "coin",
        "penny",
        "shilling",
        "said",
        "went",
        "came",
        "made",
        "took",
        "gave",
        "kept",
        "found",
        "saw",
        "knew",
        "thought",
        "told",
        "asked",
        "should",
        "would",
        "could",
        "might",
        "must",
        "shall",
        "will",
        "may",
        "do",
        "does",
        "did",
        "have",
        "had",
    ];
    for w in words {
        let t = format!("{sp}{w}");
        if !v.contains(&t) {
            v.push(t);
        }
    }
    for piece in [
        "ing", "ed", "s", "er", "ly", "ness", "ward", "wick", "holt", "mere", "ford", "ton", "by",
        "ham",
    ] {
        v.push(piece.to_string());
    }
    // Fill up with invented names built from syllables.
    let syl = [
        "ka", "ren", "tor", "mi", "lo", "sen", "dru", "fel", "ith", "bra", "nal", "vey", "quo",
        "zim", "or", "ul",
    ];
    let mut i = 0usize;
    while v.len() < VOCAB {
        let w = format!(
            "{sp}{}{}{}",
            syl[i % 16],
            syl[(i / 16 + 3) % 16],
            if i.is_multiple_of(3) { "n" } else { "" }
        );
        if !v.contains(&w) {
            v.push(w);
        }
        i += 1;
    }
    v.truncate(VOCAB);
    v
}

/// A minimal tokenizer.json (the layout of the Hugging Face tokenizers
/// library, common practice): only what klgauge reads, plus the model type.
pub fn tokenizer_json() -> String {
    let vocab = vocabulary();
    let mut map = serde_json::Map::new();
    for (id, t) in vocab.iter().enumerate() {
        map.insert(t.clone(), serde_json::Value::from(id as u64));
    }
    let added: Vec<serde_json::Value> = (0..4)
        .map(|id| serde_json::json!({"id": id, "content": vocab[id], "special": true}))
        .collect();
    let doc = serde_json::json!({
        "version": "1.0",
        "added_tokens": added,
        "model": {"type": "BPE", "vocab": map, "merges": []},
    });
    serde_json::to_string_pretty(&doc).unwrap() + "\n"
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn vocabulary_is_full_and_unique() {
        let v = vocabulary();
        assert_eq!(v.len(), VOCAB);
        let set: std::collections::HashSet<&String> = v.iter().collect();
        assert_eq!(set.len(), VOCAB, "duplicate tokens");
        assert_eq!(v[tok::THE as usize], "\u{0120}the");
        assert_eq!(v[tok::OF as usize], "\u{0120}of");
    }
}
