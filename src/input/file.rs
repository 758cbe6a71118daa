//! One safetensors file: mapped, its header validated, its tensors indexed.
//!
//! The header comes from somebody else's script and is untrusted: the
//! `safetensors` crate checks that it is JSON, that offsets are contiguous and
//! inside the file and that every shape matches its byte count, before any
//! byte of tensor data is touched. We keep only plain offsets afterwards, so
//! the map can be shared across threads without borrowing tricks.

use crate::error::{Error, Result};
use memmap2::Mmap;
use safetensors::{Dtype, SafeTensors};
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
}

impl MappedFile {
    pub fn open(path: &Path) -> Result<MappedFile> {
        let file = File::open(path).map_err(|e| Error::input(path, format!("cannot open: {e}")))?;
        let meta = file.metadata().map_err(|e| Error::input(path, format!("cannot stat: {e}")))?;
        if meta.is_dir() {
            return Err(Error::input(path, "is a directory, expected a safetensors file"));
        }
        let len = meta.len();
        if len < 8 {
            return Err(Error::input(
                path,
                format!("not a safetensors file: {len} bytes, shorter than the 8-byte header length"),
            ));
        }
        // SAFETY: the map is read-only; a file truncated by another process while
        // we run would fault, which is the accepted trade-off of every mmap reader.
        let map = unsafe { Mmap::map(&file) }.map_err(|e| Error::input(path, format!("cannot map: {e}")))?;
        let declared = u64::from_le_bytes(map[..8].try_into().expect("8 bytes"));
        if declared > len - 8 {
            return Err(Error::input(
                path,
                format!(
                    "not a safetensors file or truncated: header length {declared} exceeds the {} bytes after it",
                    len - 8
                ),
            ));
        }
        let (header_len, metadata) = SafeTensors::read_metadata(&map).map_err(|e| {
            let why = match e {
                safetensors::SafeTensorError::MetadataIncompleteBuffer => {
                    "truncated or padded: the tensor data does not end where the file ends".to_string()
                }
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
        Ok(MappedFile { path: path.to_path_buf(), map, tensors, metadata })
    }

    pub fn bytes(&self, t: &TensorEntry) -> &[u8] {
        &self.map[t.start..t.end]
    }

    /// Reads an integer tensor (I32 or I64) into i64 values.
    pub fn read_ints(&self, name: &str, t: &TensorEntry) -> Result<Vec<i64>> {
        let b = self.bytes(t);
        match t.dtype {
            Dtype::I64 => Ok(b.chunks_exact(8).map(|c| i64::from_le_bytes(c.try_into().unwrap())).collect()),
            Dtype::I32 => Ok(b.chunks_exact(4).map(|c| i32::from_le_bytes(c.try_into().unwrap()) as i64).collect()),
            d => Err(Error::input(&self.path, format!("tensor `{name}` has dtype {d}, expected I32 or I64"))),
        }
    }

    /// Reads a U8 or BOOL tensor as flags (non-zero = true).
    pub fn read_flags(&self, name: &str, t: &TensorEntry) -> Result<Vec<bool>> {
        match t.dtype {
            Dtype::U8 | Dtype::BOOL => Ok(self.bytes(t).iter().map(|&b| b != 0).collect()),
            d => Err(Error::input(&self.path, format!("tensor `{name}` has dtype {d}, expected U8 or BOOL"))),
        }
    }

    /// Reads an F32 tensor (any shape) as a flat vector.
    pub fn read_f32(&self, name: &str, t: &TensorEntry) -> Result<Vec<f32>> {
        match t.dtype {
            Dtype::F32 => Ok(self.bytes(t).chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().unwrap())).collect()),
            d => Err(Error::input(&self.path, format!("tensor `{name}` has dtype {d}, expected F32"))),
        }
    }
}
