//! One safetensors file: mapped, its header validated, its tensors indexed.
//!
//! The header comes from somebody else's script and is untrusted: the
//! `safetensors` crate checks that it is JSON, that offsets are contiguous and
//! inside the file and that every shape matches its byte count, before any
//! byte of tensor data is touched. We keep only plain offsets afterwards, so
//! the map can be shared across threads without borrowing tricks.

use crate::error::{Error, Result};
use memmap2::Mmap;
use safetensors::tensor::TensorInfo;
use safetensors::{Dtype, SafeTensors};
use std::borrow::Cow;
use std::collections::BTreeMap;
use std::fs::File;
use std::path::{Path, PathBuf};

/// Where one tensor lives inside a mapped file.
#[derive(Debug, Clone)]
pub struct TensorEntry {
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    /// Absolute byte range in the file.
    pub start: usize,
    pub end: usize,
}

#[derive(Debug)]
pub struct MappedFile {
    pub path: PathBuf,
    pub map: Mmap,
    pub tensors: BTreeMap<String, TensorEntry>,
    pub metadata: BTreeMap<String, String>,
    /// The file itself, for the positioned reads of the header and of the
    /// small tensors (see `read_at`).
    file: File,
}

impl MappedFile {
    pub fn open(path: &Path) -> Result<MappedFile> {
        // Stat before opening: opening a FIFO would block until a writer comes,
        // and a device has no fixed length to map.
        let meta =
            std::fs::metadata(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
        if meta.is_dir() {
            return Err(Error::input(
                path,
                "is a directory, expected a safetensors file",
            ));
        }
        if !meta.is_file() {
            return Err(Error::input(
                path,
                "is not a regular file (a pipe or device?), expected a safetensors file",
            ));
        }
        let file = File::open(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
        let len = file
            .metadata()
            .map_err(|e| Error::input(path, format!("cannot stat: {e}")))?
            .len();
        if len == 0 {
            return Err(Error::input(
                path,
                "empty file (0 bytes), expected a safetensors file",
            ));
        }
        if len < 8 {
            return Err(Error::input(
                path,
                format!(
                    "not a safetensors file: {len} bytes, shorter than the 8-byte header length"
                ),
            ));
        }
        // SAFETY: the map is read-only; a file truncated by another process while
        // we run would fault, which is the accepted trade-off of every mmap reader.
        let map = unsafe { Mmap::map(&file) }
            .map_err(|e| Error::input(path, format!("cannot map: {e}")))?;
        let first = read_at(&file, &map, 0, 8).map_err(|e| cannot_read(path, "header", e))?;
        let declared = u64::from_le_bytes(first[..8].try_into().expect("8 bytes"));
        if declared > len - 8 {
            return Err(Error::input(
                path,
                format!(
                    "not a safetensors file or truncated: header length {declared} exceeds the {} bytes after it",
                    len - 8
                ),
            ));
        }
        if declared < 2 {
            return Err(Error::input(
                path,
                format!(
                    "not a safetensors file: header length {declared}, too short for a JSON header"
                ),
            ));
        }
        // Read before the crate parses it from the map (which it needs for the
        // file's length), so that its pages are cached and the map's first
        // fault does not read around them. The crate refuses a header over
        // 100 MB without reading it.
        let header = if declared <= 100_000_000 {
            read_at(&file, &map, 8, 8 + declared as usize)
                .map_err(|e| cannot_read(path, "header", e))?
        } else {
            Cow::Borrowed(&map[8..8 + declared as usize])
        };
        let header = &header[..];
        let data_len = map.len() - 8 - declared as usize;
        let (header_len, metadata) = SafeTensors::read_metadata(&map).map_err(|e| {
            use safetensors::SafeTensorError as E;
            let why = match e {
                E::InvalidHeader(_) => "invalid safetensors header: not UTF-8 text".to_string(),
                E::InvalidHeaderDeserialization(j) => explain_json(header, &j.to_string()),
                E::HeaderTooLarge => format!(
                    "invalid safetensors header: {declared} bytes, more than the format allows"
                ),
                E::MetadataIncompleteBuffer
                | E::TensorInvalidInfo
                | E::InvalidOffset(_)
                | E::ValidationOverflow
                | E::MisalignedSlice => explain_layout(header, data_len)
                    .unwrap_or_else(|| format!("invalid safetensors header: {e}")),
                other => format!("invalid safetensors header: {other}"),
            };
            Error::input(path, why)
        })?;
        let data_start = 8 + header_len;
        let mut tensors = BTreeMap::new();
        for (name, info) in metadata.tensors() {
            tensors.insert(
                name.clone(),
                TensorEntry {
                    dtype: info.dtype,
                    shape: info.shape.clone(),
                    start: data_start + info.data_offsets.0,
                    end: data_start + info.data_offsets.1,
                },
            );
        }
        let metadata = metadata
            .metadata()
            .as_ref()
            .map(|m| m.iter().map(|(k, v)| (k.clone(), v.clone())).collect())
            .unwrap_or_default();
        Ok(MappedFile {
            path: path.to_path_buf(),
            map,
            tensors,
            metadata,
            file,
        })
    }

    /// The bytes of a tensor that is read whole (token ids, flags, offsets,
    /// log-probabilities): up to 1 MiB by one positioned read (see
    /// `read_at`), larger ones from the map, where reading around the first
    /// fault reads what comes next anyway and no copy of the bytes is made.
    fn bytes(&self, name: &str, t: &TensorEntry) -> Result<Cow<'_, [u8]>> {
        if t.end - t.start > 1 << 20 {
            return Ok(Cow::Borrowed(&self.map[t.start..t.end]));
        }
        read_at(&self.file, &self.map, t.start, t.end)
            .map_err(|e| cannot_read(&self.path, &format!("tensor `{name}`"), e))
    }

    /// Reads an integer tensor (I32 or I64) into i64 values.
    pub fn read_ints(&self, name: &str, t: &TensorEntry) -> Result<Vec<i64>> {
        let b = self.bytes(name, t)?;
        match t.dtype {
            Dtype::I64 => Ok(b
                .chunks_exact(8)
                .map(|c| i64::from_le_bytes(c.try_into().unwrap()))
                .collect()),
            Dtype::I32 => Ok(b
                .chunks_exact(4)
                .map(|c| i32::from_le_bytes(c.try_into().unwrap()) as i64)
                .collect()),
            d => Err(Error::input(
                &self.path,
                format!("tensor `{name}` has dtype {d}, expected I32 or I64"),
            )),
        }
    }

    /// Reads and validates `prompt_offsets`: I64 [prompts + 1], starting at 0,
    /// strictly increasing, ending at `total` (`what` names the count in messages).
    pub fn read_prompt_offsets(
        &self,
        t: &TensorEntry,
        total: usize,
        what: &str,
    ) -> Result<Vec<i64>> {
        let err = |m: String| Error::input(&self.path, m);
        if t.dtype != Dtype::I64 {
            return Err(err(format!(
                "`prompt_offsets` has dtype {}, expected I64",
                t.dtype
            )));
        }
        if t.shape.len() != 1 || t.shape[0] < 2 {
            return Err(err(format!(
                "`prompt_offsets` has shape {:?}, expected [prompts + 1] with at least one prompt",
                t.shape
            )));
        }
        let o = self.read_ints("prompt_offsets", t)?;
        if o[0] != 0 {
            return Err(err(format!(
                "`prompt_offsets` starts at {}, expected 0",
                o[0]
            )));
        }
        if let Some(w) = o.windows(2).position(|w| w[1] <= w[0]) {
            return Err(err(format!(
                "`prompt_offsets` is not strictly increasing at index {} ({} then {})",
                w,
                o[w],
                o[w + 1]
            )));
        }
        if *o.last().unwrap() != total as i64 {
            return Err(err(format!(
                "`prompt_offsets` ends at {}, expected {what} {total}",
                o.last().unwrap()
            )));
        }
        Ok(o)
    }

    /// Reads a U8 or BOOL tensor as flags (non-zero = true).
    pub fn read_flags(&self, name: &str, t: &TensorEntry) -> Result<Vec<bool>> {
        match t.dtype {
            Dtype::U8 => Ok(self.bytes(name, t)?.iter().map(|&b| b != 0).collect()),
            // A BOOL byte other than 0 or 1 is not a value the format can hold:
            // the tensor is corrupt or was written with the wrong dtype.
            Dtype::BOOL => {
                let b = self.bytes(name, t)?;
                match b.iter().position(|&b| b > 1) {
                    Some(i) => Err(Error::input(
                        &self.path,
                        format!(
                            "tensor `{name}` is BOOL but holds byte {} at element {i}; expected 0 or 1",
                            b[i]
                        ),
                    )),
                    None => Ok(b.iter().map(|&b| b != 0).collect()),
                }
            }
            d => Err(Error::input(
                &self.path,
                format!("tensor `{name}` has dtype {d}, expected U8 or BOOL"),
            )),
        }
    }

    /// Reads an F32 tensor (any shape) as a flat vector.
    pub fn read_f32(&self, name: &str, t: &TensorEntry) -> Result<Vec<f32>> {
        match t.dtype {
            Dtype::F32 => Ok(self
                .bytes(name, t)?
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes(c.try_into().unwrap()))
                .collect()),
            d => Err(Error::input(
                &self.path,
                format!("tensor `{name}` has dtype {d}, expected F32"),
            )),
        }
    }
}

/// Bytes `start..end` of a file (inside its length, as the map shows), by
/// one positioned read, or from the map off Unix.
///
/// Why not the map: on a file the page cache does not hold, the first
/// fault on a mapped page reads the device's whole read-ahead window
/// around it before it returns (8 MiB where `read_ahead_kb` is 8192), and
/// a logit file's header and its `targets` may sit at its two ends:
/// opening two such cold 128k bf16 files took 20 to 27 ms, one after the
/// other, before the pass could start; with positioned reads 1.0 to 1.2
/// ms.
fn read_at<'a>(
    file: &File,
    map: &'a Mmap,
    start: usize,
    end: usize,
) -> std::io::Result<Cow<'a, [u8]>> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileExt;
        let _ = map;
        let mut buf = vec![0u8; end - start];
        file.read_exact_at(&mut buf, start as u64)?;
        Ok(Cow::Owned(buf))
    }
    #[cfg(not(unix))]
    {
        let _ = file;
        Ok(Cow::Borrowed(&map[start..end]))
    }
}

fn cannot_read(path: &Path, what: &str, e: std::io::Error) -> Error {
    Error::input(path, format!("cannot read the {what}: {e}"))
}

/// Words for a header that the crate could not deserialize: not JSON at all,
/// JSON of the wrong kind, or one malformed entry (serde's own detail, cut
/// before its list of every known dtype, follows in parentheses).
fn explain_json(header: &[u8], detail: &str) -> String {
    let detail = detail.split(", expected one of").next().unwrap_or(detail);
    match serde_json::from_slice::<serde_json::Value>(header) {
        Err(_) => format!("invalid safetensors header: not JSON ({detail})"),
        Ok(serde_json::Value::Object(_)) => {
            format!("invalid safetensors header: a malformed entry ({detail})")
        }
        Ok(_) => "invalid safetensors header: JSON, but not an object of named tensors".to_string(),
    }
}

/// Says which tensor breaks the layout and how, after the `safetensors`
/// crate refused it with a generic reason. `data_len` is the number of bytes
/// after the header. Returns None when the header cannot be re-read (the
/// caller then keeps the crate's own wording).
pub(crate) fn explain_layout(header: &[u8], data_len: usize) -> Option<String> {
    let table: BTreeMap<String, serde_json::Value> = serde_json::from_slice(header).ok()?;
    let mut tensors: Vec<(String, TensorInfo)> = Vec::new();
    for (name, v) in table {
        if name == "__metadata__" {
            continue;
        }
        tensors.push((name, serde_json::from_value(v).ok()?));
    }
    tensors.sort_by_key(|(_, t)| t.data_offsets);
    let mut end = 0usize;
    let mut prev: Option<&str> = None;
    for (name, t) in &tensors {
        let (s, e) = t.data_offsets;
        if e < s {
            return Some(format!(
                "tensor `{name}` has data offsets [{s}, {e}) that run backwards"
            ));
        }
        if s < end {
            let other = prev.unwrap_or("?");
            return Some(format!(
                "tensor `{name}` data [{s}, {e}) overlaps tensor `{other}` (which ends at {end})"
            ));
        }
        if s > end {
            return Some(format!(
                "tensor `{name}` data starts at {s}, leaving a gap of {} bytes before it",
                s - end
            ));
        }
        let elements = t.shape.iter().try_fold(1usize, |a, &d| a.checked_mul(d));
        let bits = elements.and_then(|n| n.checked_mul(t.dtype.bitsize()));
        match bits {
            None => return Some(format!("tensor `{name}` declares shape {:?}, whose size overflows", t.shape)),
            Some(b) if b % 8 != 0 => {
                return Some(format!("tensor `{name}` of {} with shape {:?} does not fill whole bytes", t.dtype, t.shape))
            }
            Some(b) if b / 8 != e - s => {
                return Some(format!(
                    "tensor `{name}` has shape {:?} of {}, which needs {} bytes, but its data offsets span {}",
                    t.shape,
                    t.dtype,
                    b / 8,
                    e - s
                ))
            }
            _ => {}
        }
        end = e;
        prev = Some(name);
    }
    if end > data_len {
        return Some(format!(
            "truncated: the header places tensor data up to byte {end} after it, but only {data_len} bytes follow"
        ));
    }
    if end < data_len {
        return Some(format!(
            "{} bytes after the end of the last tensor's data (padded or concatenated file?)",
            data_len - end
        ));
    }
    None
}
