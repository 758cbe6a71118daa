//! A logit file as SPEC defines it: one safetensors file or a directory of
//! shards read in lexical order as one row sequence, validated as a whole
//! before any computation starts.

use super::file::MappedFile;
use crate::error::{Error, Result};
use half::{bf16, f16};
use safetensors::Dtype;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// The floating-point formats a `logits` tensor may be stored in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StoredDtype {
    F32,
    F16,
    BF16,
}

impl StoredDtype {
    pub fn name(self) -> &'static str {
        match self {
            StoredDtype::F32 => "F32",
            StoredDtype::F16 => "F16",
            StoredDtype::BF16 => "BF16",
        }
    }
    pub fn size(self) -> usize {
        match self {
            StoredDtype::F32 => 4,
            StoredDtype::F16 | StoredDtype::BF16 => 2,
        }
    }
    /// Explicit mantissa bits: the rounding step at value x is 2^(floor(log2|x|) - bits).
    pub fn mantissa_bits(self) -> i32 {
        match self {
            StoredDtype::F32 => 23,
            StoredDtype::F16 => 10,
            StoredDtype::BF16 => 7,
        }
    }
    /// Smallest spacing the format has at all (its subnormal step).
    pub fn min_step(self) -> f64 {
        match self {
            StoredDtype::F32 => 2f64.powi(-149),
            StoredDtype::F16 => 2f64.powi(-24),
            StoredDtype::BF16 => 2f64.powi(-133),
        }
    }
}

/// How rows group into prompts (SPEC, "Prompt grouping").
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Grouping {
    /// A 3-D `logits`: each sequence of `length` rows is a prompt.
    Sequences { length: usize },
    /// `prompt_offsets` (concatenated across shards, global row numbers).
    Offsets,
    /// No grouping information: every row is its own prompt.
    PerRow,
}

impl Grouping {
    /// Words for messages: "by sequences of 128 rows", "by `prompt_offsets`", ...
    pub fn describe(&self) -> String {
        match self {
            Grouping::Sequences { length } => format!("by sequences of {length} rows (3-D `logits`)"),
            Grouping::Offsets => "by `prompt_offsets`".into(),
            Grouping::PerRow => "not at all (2-D `logits` without `prompt_offsets`)".into(),
        }
    }
}

#[derive(Debug)]
struct Shard {
    file: MappedFile,
    /// First global row of this shard.
    first_row: usize,
    rows: usize,
    logits_start: usize,
    /// Columns per stored row (the file's own vocabulary).
    stride: usize,
}

#[derive(Debug)]
pub struct LogitFile {
    pub path: PathBuf,
    pub dtype: StoredDtype,
    pub rows: usize,
    /// The file's vocabulary size (columns of `logits`).
    pub vocab: usize,
    pub grouping: Grouping,
    /// Global prompt start rows, `prompts + 1` entries, first 0 and last `rows`.
    pub prompt_starts: Vec<usize>,
    pub targets: Option<Vec<i64>>,
    pub mask: Option<Vec<bool>>,
    pub metadata: BTreeMap<String, String>,
    /// Shape of `logits` in the first shard, for display.
    pub shape: Vec<usize>,
    shards: Vec<Shard>,
}

impl LogitFile {
    pub fn open(path: &Path) -> Result<LogitFile> {
        let meta = std::fs::metadata(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
        let files: Vec<PathBuf> = if meta.is_dir() {
            let mut v: Vec<PathBuf> = std::fs::read_dir(path)
                .map_err(|e| Error::input(path, format!("cannot list directory: {e}")))?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.is_file() && p.extension().map_or(false, |x| x == "safetensors"))
                .collect();
            v.sort();
            if v.is_empty() {
                return Err(Error::input(path, "directory holds no *.safetensors shard"));
            }
            v
        } else {
            vec![path.to_path_buf()]
        };

        let mut shards = Vec::with_capacity(files.len());
        let mut dtype = None;
        let mut vocab = None;
        let mut grouping = None;
        let mut prompt_starts = vec![0usize];
        let mut targets: Option<Vec<i64>> = None;
        let mut mask: Option<Vec<bool>> = None;
        let mut metadata = BTreeMap::new();
        let mut shape0 = Vec::new();
        let mut first_row = 0usize;
        let mut have_targets = None;
        let mut have_mask = None;

        for (i, fpath) in files.iter().enumerate() {
            let file = MappedFile::open(fpath)?;
            let err = |m: String| Error::input(fpath, m);
            let logits = file
                .tensors
                .get("logits")
                .ok_or_else(|| err(format!("no `logits` tensor (found: {})", names(&file))))?
                .clone();
            let d = match logits.dtype {
                Dtype::F32 => StoredDtype::F32,
                Dtype::F16 => StoredDtype::F16,
                Dtype::BF16 => StoredDtype::BF16,
                other => return Err(err(format!("`logits` has dtype {other}, expected F32, F16 or BF16"))),
            };
            let (rows, v, g) = match logits.shape.as_slice() {
                [r, v] => (*r, *v, Grouping::PerRow),
                // The crate's byte-count check multiplies the dimensions from
                // the left with overflow checks, so this cannot fail today; the
                // reader does not rely on that detail.
                [s, l, v] => match s.checked_mul(*l) {
                    Some(r) => (r, *v, Grouping::Sequences { length: *l }),
                    None => return Err(err(format!("`logits` shape {:?} has more rows than can be addressed", logits.shape))),
                },
                s => return Err(err(format!("`logits` has rank {} (shape {s:?}), expected [rows, vocab] or [sequences, length, vocab]", s.len()))),
            };
            if v == 0 {
                return Err(err("`logits` has a vocabulary of 0 columns".into()));
            }
            if rows == 0 {
                return Err(err(format!("`logits` has 0 rows (shape {:?})", logits.shape)));
            }
            if let Some(d0) = dtype {
                if d0 != d {
                    return Err(err(format!("shard dtype {} differs from the first shard's {}", d.name(), StoredDtype::name(d0))));
                }
            }
            if let Some(v0) = vocab {
                if v0 != v {
                    return Err(err(format!("shard vocabulary {v} differs from the first shard's {v0}")));
                }
            }
            let lead: Vec<usize> = logits.shape[..logits.shape.len() - 1].to_vec();

            // Targets and mask must cover exactly the leading dims of logits.
            let t = match file.tensors.get("targets") {
                Some(t) => {
                    if t.shape != lead {
                        return Err(err(format!("`targets` has shape {:?}, expected {:?} (the leading dims of `logits`)", t.shape, lead)));
                    }
                    let vals = file.read_ints("targets", t)?;
                    Some(vals)
                }
                None => None,
            };
            let m = match file.tensors.get("mask") {
                Some(t) => {
                    if t.shape != lead {
                        return Err(err(format!("`mask` has shape {:?}, expected {:?} (the leading dims of `logits`)", t.shape, lead)));
                    }
                    Some(file.read_flags("mask", t)?)
                }
                None => None,
            };
            // Offsets are local to the shard.
            let offs = match file.tensors.get("prompt_offsets") {
                Some(t) => {
                    if !matches!(g, Grouping::PerRow) {
                        return Err(err("`prompt_offsets` is only allowed with a 2-D `logits`; a 3-D one groups by sequence".into()));
                    }
                    if t.dtype != Dtype::I64 {
                        return Err(err(format!("`prompt_offsets` has dtype {}, expected I64", t.dtype)));
                    }
                    if t.shape.len() != 1 || t.shape[0] < 2 {
                        return Err(err(format!("`prompt_offsets` has shape {:?}, expected [prompts + 1] with at least one prompt", t.shape)));
                    }
                    let o = file.read_ints("prompt_offsets", t)?;
                    if o[0] != 0 {
                        return Err(err(format!("`prompt_offsets` starts at {}, expected 0", o[0])));
                    }
                    if let Some(w) = o.windows(2).position(|w| w[1] <= w[0]) {
                        return Err(err(format!("`prompt_offsets` is not strictly increasing at index {} ({} then {})", w, o[w], o[w + 1])));
                    }
                    if *o.last().unwrap() != rows as i64 {
                        return Err(err(format!("`prompt_offsets` ends at {}, expected the row count {rows}", o.last().unwrap())));
                    }
                    Some(o)
                }
                None => None,
            };
            let g = if offs.is_some() { Grouping::Offsets } else { g };
            match &grouping {
                None => grouping = Some(g.clone()),
                Some(g0) if *g0 != g => {
                    return Err(err(format!("shard groups prompts {}, the first shard {}", g.describe(), g0.describe())));
                }
                _ => {}
            }
            if i > 0 && have_targets != Some(t.is_some()) {
                return Err(err("some shards have `targets` and others do not".into()));
            }
            if i > 0 && have_mask != Some(m.is_some()) {
                return Err(err("some shards have `mask` and others do not".into()));
            }
            have_targets = Some(t.is_some());
            have_mask = Some(m.is_some());
            if let Some(t) = t {
                targets.get_or_insert_with(Vec::new).extend(t);
            }
            if let Some(m) = m {
                mask.get_or_insert_with(Vec::new).extend(m);
            }
            match (&g, offs) {
                (Grouping::Offsets, Some(o)) => prompt_starts.extend(o[1..].iter().map(|&x| first_row + x as usize)),
                (Grouping::Sequences { length }, _) => {
                    let seqs = rows / length.max(&1);
                    prompt_starts.extend((1..=seqs).map(|s| first_row + s * length));
                }
                _ => prompt_starts.extend((1..=rows).map(|r| first_row + r)),
            }
            if i == 0 {
                metadata = file.metadata.clone();
                shape0 = logits.shape.clone();
            }
            dtype = Some(d);
            vocab = Some(v);
            shards.push(Shard { first_row, rows, logits_start: logits.start, stride: v, file });
            first_row += rows;
        }
        // A 3-D tensor with length 0 has zero rows and was refused above.
        Ok(LogitFile {
            path: path.to_path_buf(),
            dtype: dtype.unwrap(),
            rows: first_row,
            vocab: vocab.unwrap(),
            grouping: grouping.unwrap(),
            prompt_starts,
            targets,
            mask,
            metadata,
            shape: shape0,
            shards,
        })
    }

    pub fn prompts(&self) -> usize {
        self.prompt_starts.len() - 1
    }

    pub fn shard_count(&self) -> usize {
        self.shards.len()
    }

    /// Prompt index of every row, by walking the starts once (cheap, rows * 4 bytes).
    pub fn prompt_of_rows(&self) -> Vec<u32> {
        let mut out = Vec::with_capacity(self.rows);
        for (p, w) in self.prompt_starts.windows(2).enumerate() {
            out.extend(std::iter::repeat(p as u32).take(w[1] - w[0]));
        }
        out
    }

    fn shard_of(&self, row: usize) -> &Shard {
        let i = self.shards.partition_point(|s| s.first_row + s.rows <= row);
        &self.shards[i]
    }

    /// The stored bytes of the first `cols` columns of `row`.
    pub fn row_bytes(&self, row: usize, cols: usize) -> &[u8] {
        let s = self.shard_of(row);
        let es = self.dtype.size();
        let start = s.logits_start + (row - s.first_row) * s.stride * es;
        &s.file.map[start..start + cols * es]
    }

    /// Decodes the first `out.len()` columns of `row` into f32.
    pub fn read_row(&self, row: usize, out: &mut [f32]) {
        let bytes = self.row_bytes(row, out.len());
        decode_row(self.dtype, bytes, out);
    }

    /// Asks the kernel to read ahead `rows` starting at `row` and to drop
    /// pages of rows before it; on non-Unix systems this does nothing.
    pub fn advise_window(&self, row: usize, rows: usize) {
        for s in &self.shards {
            let es = self.dtype.size();
            let row_bytes = s.stride * es;
            let lo = row.max(s.first_row);
            let hi = (row + rows).min(s.first_row + s.rows);
            if lo < hi {
                let off = s.logits_start + (lo - s.first_row) * row_bytes;
                let _ = s.file.map.advise_range(memmap2::Advice::WillNeed, off, (hi - lo) * row_bytes);
            }
        }
    }

    /// Releases pages of rows that were fully processed, so a file larger than
    /// RAM streams through the page cache instead of filling it.
    pub fn release_before(&self, row: usize) {
        for s in &self.shards {
            if row <= s.first_row {
                continue;
            }
            let done = (row - s.first_row).min(s.rows);
            let es = self.dtype.size();
            let page = 4096;
            let begin = s.logits_start / page * page;
            let end = (s.logits_start + done * s.stride * es) / page * page;
            if end > begin + page {
                // SAFETY: DontNeed on a read-only private file mapping only drops
                // cached pages; later reads fault them back in from the file.
                let _ = unsafe { s.file.map.unchecked_advise_range(memmap2::UncheckedAdvice::DontNeed, begin, end - begin) };
            }
        }
    }
}

fn names(f: &MappedFile) -> String {
    if f.tensors.is_empty() {
        "no tensors".into()
    } else {
        f.tensors.keys().map(|k| format!("`{k}`")).collect::<Vec<_>>().join(", ")
    }
}

/// Converts stored little-endian values to f32. The aligned case goes through
/// `half`'s bulk slice conversion (vectorised); a misaligned tensor, which the
/// format allows, falls back to a byte-wise decode.
pub fn decode_row(dtype: StoredDtype, bytes: &[u8], out: &mut [f32]) {
    use half::slice::HalfFloatSliceExt;
    match dtype {
        StoredDtype::F32 => match bytemuck::try_cast_slice::<u8, f32>(bytes) {
            Ok(s) => out.copy_from_slice(s),
            Err(_) => {
                for (o, c) in out.iter_mut().zip(bytes.chunks_exact(4)) {
                    *o = f32::from_le_bytes(c.try_into().unwrap());
                }
            }
        },
        StoredDtype::BF16 => match bytemuck::try_cast_slice::<u8, bf16>(bytes) {
            Ok(s) => s.convert_to_f32_slice(out),
            Err(_) => {
                for (o, c) in out.iter_mut().zip(bytes.chunks_exact(2)) {
                    *o = bf16::from_le_bytes([c[0], c[1]]).to_f32();
                }
            }
        },
        StoredDtype::F16 => match bytemuck::try_cast_slice::<u8, f16>(bytes) {
            Ok(s) => s.convert_to_f32_slice(out),
            Err(_) => {
                for (o, c) in out.iter_mut().zip(bytes.chunks_exact(2)) {
                    *o = f16::from_le_bytes([c[0], c[1]]).to_f32();
                }
            }
        },
    }
}
