//! A logit file as SPEC defines it: one safetensors file or a directory of
//! shards read in lexical order as one row sequence, validated as a whole
//! before any computation starts.

use super::file::MappedFile;
use crate::error::{Error, Result};
use crate::kernel::buf::Aligned;
use crate::kernel::{Ahead, Row};
use safetensors::Dtype;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

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
    /// Stored little-endian bytes of this format as a kernel row.
    pub fn row(self, bytes: &[u8]) -> Row<'_> {
        match self {
            StoredDtype::F32 => Row::F32(bytes),
            StoredDtype::F16 => Row::F16(bytes),
            StoredDtype::BF16 => Row::Bf16(bytes),
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
            Grouping::Sequences { length } => {
                format!("by sequences of {length} rows (3-D `logits`)")
            }
            Grouping::Offsets => "by `prompt_offsets`".into(),
            Grouping::PerRow => "not at all (2-D `logits` without `prompt_offsets`)".into(),
        }
    }
}

impl Grouping {
    /// The name reports use: "sequences", "offsets" or "rows" (each row its own prompt).
    pub fn name(&self) -> &'static str {
        match self {
            Grouping::Sequences { .. } => "sequences",
            Grouping::Offsets => "offsets",
            Grouping::PerRow => "rows",
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
    /// Map offset up to which pages were already released (with
    /// drop-behind, dropped from the page cache up to the last
    /// `DROP_ALIGN` boundary before it).
    released: AtomicUsize,
    /// The file opened for positioned reads (the streaming path).
    reader: Option<std::fs::File>,
    /// Whether the streaming pass reads rows straight from the map (see
    /// `LogitFile::stored_row`), decided on first use.
    stream_map: std::sync::OnceLock<bool>,
    /// Whether most of the probe's pieces were out of the page cache when
    /// first asked (see `Shard::mostly_uncached`).
    uncached: std::sync::OnceLock<bool>,
    /// Whether `release_before` also drops finished rows from the page
    /// cache (see `LogitFile::set_drop_behind`).
    drop_behind: std::sync::atomic::AtomicBool,
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
        let meta =
            std::fs::metadata(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
        let files: Vec<PathBuf> = if meta.is_dir() {
            let mut v: Vec<PathBuf> = std::fs::read_dir(path)
                .map_err(|e| Error::input(path, format!("cannot list directory: {e}")))?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.is_file() && p.extension().is_some_and(|x| x == "safetensors"))
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
                other => {
                    return Err(err(format!(
                        "`logits` has dtype {other}, expected F32, F16 or BF16"
                    )))
                }
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
                return Err(err(format!(
                    "`logits` has 0 rows (shape {:?})",
                    logits.shape
                )));
            }
            if let Some(d0) = dtype {
                if d0 != d {
                    return Err(err(format!(
                        "shard dtype {} differs from the first shard's {}",
                        d.name(),
                        StoredDtype::name(d0)
                    )));
                }
            }
            if let Some(v0) = vocab {
                if v0 != v {
                    return Err(err(format!(
                        "shard vocabulary {v} differs from the first shard's {v0}"
                    )));
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
                        return Err(err(format!(
                            "`mask` has shape {:?}, expected {:?} (the leading dims of `logits`)",
                            t.shape, lead
                        )));
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
                    Some(file.read_prompt_offsets(t, rows, "the row count")?)
                }
                None => None,
            };
            let g = if offs.is_some() { Grouping::Offsets } else { g };
            match &grouping {
                None => grouping = Some(g.clone()),
                Some(g0) if *g0 != g => {
                    return Err(err(format!(
                        "shard groups prompts {}, the first shard {}",
                        g.describe(),
                        g0.describe()
                    )));
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
                (Grouping::Offsets, Some(o)) => {
                    prompt_starts.extend(o[1..].iter().map(|&x| first_row + x as usize))
                }
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
            shards.push(Shard {
                first_row,
                rows,
                logits_start: logits.start,
                stride: v,
                released: AtomicUsize::new(0),
                reader: std::fs::File::open(fpath).ok(),
                stream_map: std::sync::OnceLock::new(),
                uncached: std::sync::OnceLock::new(),
                drop_behind: std::sync::atomic::AtomicBool::new(false),
                file,
            });
            first_row += rows;
        }
        // A 3-D tensor with length 0 has zero rows and was refused above.
        let f = LogitFile {
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
        };
        f.advise_sequential();
        Ok(f)
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
            out.extend(std::iter::repeat_n(p as u32, w[1] - w[0]));
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
        let start = s.row_start(row, es);
        &s.file.map[start..start + cols * es]
    }

    /// Decodes the first `out.len()` columns of `row` into f32, for single
    /// rows far apart (the worst positions' tokens, `inspect`'s samples):
    /// with one positioned read of the row's bytes where the file is open
    /// for reads, else through the map. On the map, each page fault on a
    /// page the page cache no longer holds brings the shard's sequential
    /// read-ahead with it, megabytes around every such row: after a pass
    /// over files larger than the memory allowed, the faults for the 20
    /// worst positions' tokens were 9% of a run's CPU samples.
    pub fn read_row(&self, row: usize, out: &mut [f32]) {
        self.read_row_via(row, out, &mut Vec::new());
    }

    /// `read_row` with the caller's reusable buffer for the bytes read
    /// (`bytes`), for callers that read many rows.
    pub fn read_row_via(&self, row: usize, out: &mut [f32], bytes: &mut Vec<u8>) {
        let (s, es) = (self.shard_of(row), self.dtype.size());
        if let Some(f) = &s.reader {
            bytes.resize(out.len() * es, 0);
            if s.read_row_into(f, row, es, bytes) {
                decode_row(self.dtype, bytes, out);
                return;
            }
        }
        let bytes = self.row_bytes(row, out.len());
        decode_row(self.dtype, bytes, out);
    }

    /// The first `cols` columns of `row` in their stored form, for the
    /// streaming pass: straight from the map where the page cache maps
    /// cheaply, else read with one positioned read into the caller's
    /// reusable `raw`, where it stays in cache for the kernel's passes.
    ///
    /// Why two ways: the map costs no copy, but every page must be mapped
    /// in (and released behind). Where the page cache holds the file in
    /// large pieces (recent kernels, on file systems that support them), a
    /// fault maps hundreds of kilobytes and the map is the cheaper way (at
    /// 128k bf16 on two threads, 10% less time than reads); where it holds
    /// 4 KiB pages, faults and the kernel's per-page bookkeeping cost more
    /// than copying (10% more time). `map_streams_cheaply` measures which,
    /// once per shard, when the pass first reads it. `KLGAUGE_IO=map` or
    /// `KLGAUGE_IO=read` overrides it.
    pub fn stored_row<'a>(&'a self, row: usize, cols: usize, raw: &'a mut Aligned<u8>) -> Row<'a> {
        let (s, es) = (self.shard_of(row), self.dtype.size());
        if let Some(f) = s.positioned_reader(es) {
            raw.resize(cols * es);
            if s.read_row_into(f, row, es, raw) {
                return self.dtype.row(raw);
            }
        }
        self.dtype.row(self.row_bytes(row, cols))
    }

    /// Makes the choice `stored_row` makes when it first reads the shard
    /// that holds `row` (the map or positioned reads, see there) now, so
    /// that a caller can have it made for several files side by side
    /// rather than by whichever worker reads each file first while the
    /// others wait for it.
    pub fn choose_reads(&self, row: usize) {
        self.shard_of(row).streams_from_map(self.dtype.size());
    }

    /// The mapped bytes of `row` for the kernel to pull toward the cache
    /// before it reads them (`kernel::Ahead`), where the streaming pass
    /// reads this file from the map; else none (a positioned read copies
    /// the row into cache anyway).
    pub fn ahead(&self, row: usize, cols: usize) -> Ahead<'_> {
        let s = self.shard_of(row);
        if s.positioned_reader(self.dtype.size()).is_some() {
            return Ahead::NONE;
        }
        Ahead(self.row_bytes(row, cols))
    }

    /// Releases the mapped pages of rows before `row` that were not released
    /// yet, so that a file larger than RAM streams through the page cache and
    /// the process's resident size stays bounded. Only whole pages that hold
    /// nothing but finished rows are released; each page is released once.
    /// The page cache keeps the file's pages, so a later run still finds
    /// them, unless `set_drop_behind` asked for them to be dropped too: then
    /// up to the last `DROP_ALIGN` boundary before `row` (see there).
    pub fn release_before(&self, row: usize) {
        let es = self.dtype.size();
        let page = page_size();
        for s in &self.shards {
            if row <= s.first_row {
                continue;
            }
            let done = (row - s.first_row).min(s.rows);
            let end = s.row_start(s.first_row + done, es) / page * page;
            let begin = s
                .released
                .load(Ordering::Relaxed)
                .max(s.logits_start / page * page);
            if end > begin {
                // SAFETY: DontNeed on a read-only private file mapping only drops
                // this process's page-table entries for those pages (nothing was
                // ever written to them); later reads fault them back in from the
                // page cache or the file. No reference into the range is alive:
                // the rows before `row` are finished.
                let _ = unsafe {
                    s.file.map.unchecked_advise_range(
                        memmap2::UncheckedAdvice::DontNeed,
                        begin,
                        end - begin,
                    )
                };
                s.released.store(end, Ordering::Relaxed);
            }
            // Pages still mapped (by another process) stay. The last call
            // dropped up to `begin`'s boundary, where this range starts.
            #[cfg(target_os = "linux")]
            if let (true, Some(f)) = (s.drop_behind.load(Ordering::Relaxed), &s.reader) {
                let (from, cut) = (
                    begin / DROP_ALIGN * DROP_ALIGN,
                    end / DROP_ALIGN * DROP_ALIGN,
                );
                if cut > from {
                    fadvise(f, from, cut - from, libc::POSIX_FADV_DONTNEED);
                }
            }
        }
    }

    /// Bytes of one stored row.
    pub fn row_len_bytes(&self) -> usize {
        self.vocab * self.dtype.size()
    }

    /// Makes `release_before` also drop the finished rows from the page
    /// cache, in the shards that were mostly not cached when first asked
    /// (`Shard::mostly_uncached`: here, at the start of the run). For a
    /// run whose files cannot stay cached anyway (more than
    /// `room::cache_room`): it frees their pages at once instead of leaving
    /// reclaim to find them (see `input::room`). Off by default: files
    /// that fit stay cached for the next run. A shard found cached is left
    /// alone even then: something holds it in memory (a larger machine
    /// outside this process's memory cgroup, say), and dropping its pages
    /// would only send the next run to the disk.
    ///
    /// `ahead_room`: the bytes of page cache this file's read-ahead may
    /// take. The kernel keeps up to two windows in flight per file, and
    /// `advise_sequential` doubled them; where two doubled windows of the
    /// shard's device exceed `ahead_room` (or its window is not known), a
    /// dropping shard goes back to the plain window. Within a memory limit
    /// the doubled windows of several files crowded out the rows the pass
    /// was about to read, which it then read from the disk a second time
    /// (three candidates in a 128 MiB cgroup where `read_ahead_kb` is
    /// 8192: 2.7 to 2.8 GB read for 2.10 GB of files, 1.77 times as long
    /// as `cat`; with the plain window 2.10 GB, 0.95 times). Where they fit,
    /// the doubled windows read faster (see DEVELOPERS.md, "Reading rows").
    pub fn set_drop_behind(&self, on: bool, ahead_room: u64) {
        #[cfg(not(target_os = "linux"))]
        let _ = ahead_room;
        let es = self.dtype.size();
        for s in &self.shards {
            let drop = on && s.mostly_uncached(es);
            s.drop_behind.store(drop, Ordering::Relaxed);
            #[cfg(target_os = "linux")]
            if let (true, Some(f)) = (drop, &s.reader) {
                let window = crate::input::room::device_read_ahead(f);
                if window.is_none_or(|w| 4 * w > ahead_room) {
                    fadvise(f, s.logits_start, s.logits_len(es), libc::POSIX_FADV_NORMAL);
                }
            }
        }
    }

    /// Tells the kernel that the logits of every shard will be read once,
    /// front to back, through the map and through the file opened for
    /// positioned reads (twice the read-ahead of a plain read).
    ///
    /// This is all the read-ahead there is: the kernel reads ahead of the
    /// pass as it goes. An explicit `MADV_WILLNEED` for the next block of
    /// rows, which earlier builds issued, reads only the device's read-ahead
    /// size per call (8 MiB of a 64 MiB window where `read_ahead_kb` is
    /// 8192, 128 KiB at the usual default), in 4 KiB pages where the
    /// kernel's own read-ahead builds large folios, and under a memory limit
    /// its pages were evicted again before the pass got there. Leaving it
    /// out made runs on files not in the page cache faster (0.392 against
    /// 0.530 s for 1 GB, 0.643 against 0.686 s within a memory limit a
    /// quarter of that) and did not change runs on cached files (see
    /// DEVELOPERS.md, "Reading rows").
    fn advise_sequential(&self) {
        let es = self.dtype.size();
        for s in &self.shards {
            let len = s.logits_len(es);
            let _ = s
                .file
                .map
                .advise_range(memmap2::Advice::Sequential, s.logits_start, len);
            #[cfg(target_os = "linux")]
            if let Some(f) = &s.reader {
                fadvise(f, s.logits_start, len, libc::POSIX_FADV_SEQUENTIAL);
            }
        }
    }
}

impl Shard {
    /// The file the streaming pass reads this shard's rows from with
    /// positioned reads, or None where it reads them from the map: where
    /// the file could not be opened for reads, off Unix, or where
    /// `streams_from_map` chose the map.
    fn positioned_reader(&self, es: usize) -> Option<&std::fs::File> {
        if !cfg!(unix) {
            return None;
        }
        let f = self.reader.as_ref()?;
        (!self.streams_from_map(es)).then_some(f)
    }

    /// Whether the streaming pass reads this shard from the map (see
    /// `LogitFile::stored_row`); the first call decides.
    fn streams_from_map(&self, es: usize) -> bool {
        *self.stream_map.get_or_init(|| match io_choice() {
            Some(m) => m,
            None => self.map_streams_cheaply(es),
        })
    }

    /// Touches 8 MiB of the shard's rows through the map, in eight pieces
    /// spread over the shard, and counts the page faults this thread took:
    /// true where a fault mapped 256 KiB or more on average. Measured here
    /// on 8 MiB pieces: 1.6 MiB per fault where the page cache holds the
    /// file in large pieces, 64 KiB where it holds 4 KiB pages (the kernel
    /// maps a 64 KiB window around each fault), and anything between on
    /// files whose cache was built partly one way, partly the other (the
    /// front of a file that was read from disk: read-ahead starts small).
    /// Hence pieces spread over the whole shard. The touched pages stay
    /// mapped until the pass releases the rows they hold (see
    /// `release_before`). Where the count is unavailable (not Linux), or
    /// the shard holds under 1 MiB (either way is cheap), positioned reads.
    ///
    /// Where most of those pieces are not in the page cache (a file not
    /// read since the machine dropped it, or larger than the memory it may
    /// use), nothing is touched and the answer is positioned reads: a touch
    /// would read eight scattered pieces from disk, each with its own
    /// read-ahead, which a file larger than memory evicts again before the
    /// pass gets there, and the faults would count how the kernel reads
    /// from disk, not how the cache holds the file. Positioned reads front
    /// to back get the kernel's sequential read-ahead, in large pieces
    /// where the file system supports them; on such files the map took
    /// 1.5 times as long, 2.1 times within a memory limit (see
    /// DEVELOPERS.md, "Reading rows").
    fn map_streams_cheaply(&self, es: usize) -> bool {
        const PER_FAULT: usize = 256 << 10;
        let Some(before) = thread_faults() else {
            return false;
        };
        if self.logits_len(es) < PIECE || self.mostly_uncached(es) {
            return false;
        }
        let page = page_size();
        let mut touched = 0;
        let mut x = 0u8;
        for k in 0..PIECES {
            let bytes = self.piece(k, es);
            for i in (0..PIECE).step_by(page) {
                // SAFETY: i < PIECE, inside the slice; a volatile read so
                // that the touch is not optimised away.
                x ^= unsafe { std::ptr::read_volatile(bytes.as_ptr().add(i)) };
            }
            touched += PIECE;
        }
        std::hint::black_box(x);
        match thread_faults() {
            Some(after) => (after - before).max(1) * PER_FAULT <= touched,
            None => false,
        }
    }

    /// Bytes of this shard's logits.
    fn logits_len(&self, es: usize) -> usize {
        self.rows * self.stride * es
    }

    /// Byte offset in the file of `row` (a global row this shard holds).
    fn row_start(&self, row: usize, es: usize) -> usize {
        self.logits_start + (row - self.first_row) * self.stride * es
    }

    /// Fills `buf` with the first bytes of `row` by one positioned read
    /// from `f` (this shard's file); false where that failed or the system
    /// has no positioned reads.
    fn read_row_into(&self, f: &std::fs::File, row: usize, es: usize, buf: &mut [u8]) -> bool {
        #[cfg(unix)]
        {
            use std::os::unix::fs::FileExt;
            f.read_exact_at(buf, self.row_start(row, es) as u64).is_ok()
        }
        #[cfg(not(unix))]
        {
            let _ = (f, row, es, buf);
            false
        }
    }

    /// Piece k of the probe's eight: PIECE bytes starting at (2k + 1) / 16
    /// of the way through the shard's logits, on a page boundary (the last
    /// one ends inside the shard; pieces overlap on a shard under 8 MiB).
    /// The shard holds at least PIECE bytes.
    fn piece(&self, k: usize, es: usize) -> &[u8] {
        let (total, page) = (self.logits_len(es), page_size());
        let from = ((total - PIECE) * (2 * k + 1) / (2 * PIECES)) / page * page;
        &self.file.map[self.logits_start + from..][..PIECE]
    }

    /// Whether most of the probe's pieces are not in the page cache
    /// (`mincore`, nothing touched). False where the system cannot tell,
    /// or the shard holds under PIECE bytes. Asked once per shard, when a
    /// run begins (by `set_drop_behind`, else by the probe), and kept: both
    /// want the state the run found, not one its own reads have changed.
    fn mostly_uncached(&self, es: usize) -> bool {
        *self.uncached.get_or_init(|| {
            if self.logits_len(es) < PIECE {
                return false;
            }
            let page = page_size();
            let cached: Option<usize> = (0..PIECES)
                .map(|k| resident_pages(self.piece(k, es), page))
                .sum();
            cached.is_some_and(|c| 2 * c * page < PIECES * PIECE)
        })
    }
}

/// Drop-behind asks the page cache to drop whole multiples of this (2 MiB,
/// the largest piece, "folio", in which x86-64 Linux caches a file read
/// ahead), never a range that ends inside one. The kernel (6.18 here)
/// keeps a cached piece that a dropped range covers only in part, and the
/// next range, which starts inside it, skips it too: with ranges that
/// ended where a block's rows end, up to 2 MiB per file per block stayed
/// cached. Three candidates at 128k bf16 in 16-row blocks left 245 of
/// each file's 525 MB in the cache (`fincore` after a run in a 1.5 GiB
/// memory cgroup); in a 256 MiB cgroup those pages crowded out the
/// read-ahead, which the pass then read from disk again: 2.15 to 2.54 GB
/// read for 2.10 GB of files with 62-row blocks, 3.1 to 4.1 GB with
/// 16-row blocks. Aligned: 2.13 GB, and 6 to 16 MB of each file left
/// cached (see DEVELOPERS.md, "Reading rows").
const DROP_ALIGN: usize = 2 << 20;

/// The probe's pieces of a shard (`Shard::piece`): how many, and their size.
const PIECES: usize = 8;
const PIECE: usize = 1 << 20;

/// Gives the kernel a hint about how bytes `off .. off + len` of `f` will
/// be used (`posix_fadvise`); a hint only, so its result is ignored.
#[cfg(target_os = "linux")]
fn fadvise(f: &std::fs::File, off: usize, len: usize, advice: libc::c_int) {
    use std::os::fd::AsRawFd;
    // SAFETY: a hint on an open descriptor; it reads and writes no memory
    // of this process.
    unsafe {
        libc::posix_fadvise(
            f.as_raw_fd(),
            off as libc::off_t,
            len as libc::off_t,
            advice,
        );
    }
}

/// `KLGAUGE_IO=map` or `KLGAUGE_IO=read`: how the streaming pass reads rows,
/// whatever the probe would choose (`map_streams_cheaply`).
fn io_choice() -> Option<bool> {
    static V: std::sync::OnceLock<Option<bool>> = std::sync::OnceLock::new();
    *V.get_or_init(|| match std::env::var("KLGAUGE_IO").as_deref() {
        Ok("map") => Some(true),
        Ok("read") => Some(false),
        _ => None,
    })
}

/// Page faults (minor and major) this thread has taken so far, where the
/// system counts them per thread.
fn thread_faults() -> Option<usize> {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: all zeroes is a valid rusage (integers and timevals), and
        // getrusage only writes the struct it is given.
        unsafe {
            let mut ru: libc::rusage = std::mem::zeroed();
            if libc::getrusage(libc::RUSAGE_THREAD, &mut ru) == 0 {
                return Some(ru.ru_minflt as usize + ru.ru_majflt as usize);
            }
        }
    }
    None
}

/// How many of the pages that `bytes` (part of a map) lies on are in the
/// page cache, without touching them (`mincore`); None where the system
/// cannot tell.
fn resident_pages(bytes: &[u8], page: usize) -> Option<usize> {
    #[cfg(target_os = "linux")]
    {
        let start = bytes.as_ptr() as usize / page * page;
        let end = (bytes.as_ptr() as usize + bytes.len()).div_ceil(page) * page;
        let mut vec = vec![0u8; (end - start) / page];
        // SAFETY: [start, end) covers only pages of `bytes`, which lie inside
        // a live mapping; mincore reads no memory there and writes one byte
        // per page into `vec`, which has exactly that many.
        let r = unsafe { libc::mincore(start as *mut libc::c_void, end - start, vec.as_mut_ptr()) };
        if r == 0 {
            return Some(vec.iter().filter(|&&b| b & 1 != 0).count());
        }
    }
    let _ = (bytes, page);
    None
}

/// The virtual-memory page size (4 KiB where it cannot be asked).
fn page_size() -> usize {
    #[cfg(unix)]
    {
        // SAFETY: sysconf has no preconditions.
        let v = unsafe { libc::sysconf(libc::_SC_PAGESIZE) };
        if v > 0 {
            return v as usize;
        }
    }
    4096
}

fn names(f: &MappedFile) -> String {
    if f.tensors.is_empty() {
        "no tensors".into()
    } else {
        f.tensors
            .keys()
            .map(|k| format!("`{k}`"))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// Converts stored little-endian values to f32 (any alignment; the format
/// allows a misaligned tensor) with the kernel's vectorised decoders.
pub fn decode_row(dtype: StoredDtype, bytes: &[u8], out: &mut [f32]) {
    crate::kernel::decode(dtype.row(bytes), out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A bf16 logit file of `rows` x `vocab` in the temporary directory,
    /// written with the safetensors crate; values vary by row and column.
    fn bf16_file(tag: &str, rows: usize, vocab: usize) -> PathBuf {
        let mut bytes = Vec::with_capacity(rows * vocab * 2);
        for r in 0..rows {
            for c in 0..vocab {
                let v = half::bf16::from_f32(((r * 7 + c * 13) % 97) as f32 * 0.125 - 6.0);
                bytes.extend_from_slice(&v.to_le_bytes());
            }
        }
        let view = safetensors::tensor::TensorView::new(
            safetensors::Dtype::BF16,
            vec![rows, vocab],
            &bytes,
        )
        .unwrap();
        let path = std::env::temp_dir().join(format!(
            "klgauge-logits-{}-{tag}.safetensors",
            std::process::id()
        ));
        safetensors::serialize_to_file([("logits", view)], None, &path).unwrap();
        path
    }

    #[test]
    fn positioned_row_reads_give_the_mapped_values() {
        let path = bf16_file("rows", 9, 1000);
        let f = LogitFile::open(&path).unwrap();
        let (mut a, mut b) = (vec![0f32; 1000], vec![0f32; 1000]);
        for row in [0, 4, 8] {
            f.read_row(row, &mut a);
            decode_row(f.dtype, f.row_bytes(row, 1000), &mut b);
            assert_eq!(a, b, "row {row}");
            // The stored values themselves (exact in bf16).
            assert_eq!(a[3], ((row * 7 + 39) % 97) as f32 * 0.125 - 6.0);
        }
        let _ = std::fs::remove_file(&path);
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn resident_pages_counts_touched_pages() {
        let path = bf16_file("resident", 256, 4096);
        let f = LogitFile::open(&path).unwrap();
        let page = page_size();
        let bytes = &f.shards[0].file.map[..];
        let sum: u64 = bytes.iter().step_by(page).map(|&b| b as u64).sum();
        std::hint::black_box(sum);
        let pages =
            (bytes.as_ptr() as usize + bytes.len()).div_ceil(page) - bytes.as_ptr() as usize / page;
        assert_eq!(resident_pages(bytes, page), Some(pages));
        // A cached shard keeps its pages even in a run that drops behind.
        f.set_drop_behind(true, u64::MAX);
        assert!(!f.shards[0].drop_behind.load(Ordering::Relaxed));
        let _ = std::fs::remove_file(&path);
    }

    /// `bf16_file` dropped from the page cache and opened; None (the file
    /// removed) where the file system keeps it in memory anyway (tmpfs),
    /// where a test of reading uncached files has nothing to check.
    #[cfg(target_os = "linux")]
    fn uncached_bf16_file(tag: &str, rows: usize, vocab: usize) -> Option<(PathBuf, LogitFile)> {
        let path = bf16_file(tag, rows, vocab);
        {
            let file = std::fs::File::open(&path).unwrap();
            file.sync_all().unwrap();
            fadvise(&file, 0, 0, libc::POSIX_FADV_DONTNEED);
        }
        let f = LogitFile::open(&path).unwrap();
        let map = &f.shards[0].file.map[..];
        let page = page_size();
        if 4 * resident_pages(map, page).unwrap() > map.len() / page {
            eprintln!("skipped: the file system kept the file in memory");
            drop(f);
            let _ = std::fs::remove_file(&path);
            return None;
        }
        Some((path, f))
    }

    /// With drop-behind, finished rows released block by block, at row
    /// boundaries that fall inside the page cache's large pieces, leave none
    /// of their pages cached up to the last `DROP_ALIGN` boundary, and the
    /// rows not yet finished stay cached. (Dropping each block's exact
    /// range, as before, left 48 of those pages cached on the machine
    /// where this was found, where the file sits in pieces of up to 2 MiB.)
    #[cfg(target_os = "linux")]
    #[test]
    fn drop_behind_leaves_no_finished_rows_cached() {
        // 16 KiB rows; blocks of 37 rows (592 KiB) end inside 2 MiB pieces.
        let (rows, vocab, block) = (1024, 8192, 37);
        let Some((path, f)) = uncached_bf16_file("dropped", rows, vocab) else {
            return;
        };
        let s = &f.shards[0];
        let page = page_size();
        let map = &s.file.map[..];
        f.set_drop_behind(true, u64::MAX);
        assert!(s.drop_behind.load(Ordering::Relaxed));
        // Row by row, front to back, as the pass reads it: the read-ahead
        // caches the file in large pieces where the kernel does so.
        let mut raw = crate::kernel::buf::Aligned::zeroed(0);
        let mut last = 0;
        for row in 0..rows {
            std::hint::black_box(f.stored_row(row, vocab, &mut raw).get(0));
            if row % block == 0 && row > 0 {
                f.release_before(row);
                last = row;
            }
        }
        let end = s.row_start(last, 2);
        let cut = end / DROP_ALIGN * DROP_ALIGN;
        assert!(cut + DROP_ALIGN > end && cut > 0);
        assert_eq!(
            resident_pages(&map[..cut], page),
            Some(0),
            "finished rows before byte {cut} are still cached"
        );
        let ahead = &map[end.next_multiple_of(page)..];
        let cached = resident_pages(ahead, page).unwrap();
        assert!(
            2 * cached > ahead.len() / page,
            "unfinished rows were dropped: {cached} of {} pages cached",
            ahead.len() / page
        );
        let _ = std::fs::remove_file(&path);
    }

    /// A shard the page cache does not hold is read with positioned reads,
    /// and the probe touches none of it. Where the file system keeps the
    /// file in memory anyway (tmpfs), there is nothing to check.
    #[cfg(target_os = "linux")]
    #[test]
    fn a_shard_not_in_the_page_cache_is_read_without_touching_the_map() {
        let Some((path, f)) = uncached_bf16_file("cold", 512, 8192) else {
            return;
        };
        let s = &f.shards[0];
        let page = page_size();
        let logits = &s.file.map[s.logits_start..];
        let before = resident_pages(logits, page).unwrap();
        f.set_drop_behind(true, u64::MAX);
        assert!(s.drop_behind.load(Ordering::Relaxed));
        f.set_drop_behind(false, u64::MAX);
        assert!(!s.drop_behind.load(Ordering::Relaxed));
        assert!(!s.streams_from_map(2) || io_choice() == Some(true));
        if io_choice().is_none() {
            // A touch would bring in the probe's 8 MiB (2,048 pages here).
            // Read-ahead the file's opening started may still add a few
            // hundred pages (seen on a CI machine: 256 -> 512), hence a
            // margin of half the pieces.
            let after = resident_pages(logits, page).unwrap();
            assert!(
                after < before + PIECES * PIECE / page / 2,
                "the probe read the file: {before} -> {after} pages cached"
            );
        }
        let _ = std::fs::remove_file(&path);
    }
}
