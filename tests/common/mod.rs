//! Helpers shared by the integration tests: writing logit files with the
//! `safetensors` crate and running the built binary.
#![allow(dead_code)]

use half::{bf16, f16};
use safetensors::tensor::{Dtype, TensorView};
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// A tensor to write: dtype, shape and little-endian bytes.
pub struct T {
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub data: Vec<u8>,
}

pub fn floats(dtype: Dtype, shape: &[usize], v: &[f32]) -> T {
    let data = match dtype {
        Dtype::F32 => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Dtype::F16 => v
            .iter()
            .flat_map(|x| f16::from_f32(*x).to_le_bytes())
            .collect(),
        Dtype::BF16 => v
            .iter()
            .flat_map(|x| bf16::from_f32(*x).to_le_bytes())
            .collect(),
        d => panic!("not a float dtype: {d}"),
    };
    T {
        dtype,
        shape: shape.to_vec(),
        data,
    }
}

pub fn i64s(shape: &[usize], v: &[i64]) -> T {
    T {
        dtype: Dtype::I64,
        shape: shape.to_vec(),
        data: v.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}

pub fn u8s(shape: &[usize], v: &[u8]) -> T {
    T {
        dtype: Dtype::U8,
        shape: shape.to_vec(),
        data: v.to_vec(),
    }
}

pub fn write(path: &Path, tensors: Vec<(&str, T)>, metadata: Option<HashMap<String, String>>) {
    let views: Vec<(String, TensorView)> = tensors
        .iter()
        .map(|(n, t)| {
            (
                n.to_string(),
                TensorView::new(t.dtype, t.shape.clone(), &t.data).unwrap(),
            )
        })
        .collect();
    safetensors::serialize_to_file(views, metadata, path).unwrap();
}

/// Deterministic pseudo-random generator for test data (a 64-bit LCG with
/// the high bits taken; quality is ample for test inputs).
pub struct Rng(pub u64);

impl Rng {
    pub fn uniform(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64) / ((1u64 << 53) as f64)
    }
    /// Standard normal by Box-Muller (common practice).
    pub fn normal(&mut self) -> f64 {
        let u1 = self.uniform().max(1e-300);
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

/// A reference/candidate pair of random 2-D logits with targets and prompt offsets.
pub struct Pair {
    pub dir: tempdir::Dir,
    pub reference: PathBuf,
    pub candidate: PathBuf,
    pub x: Vec<f32>,
    pub y: Vec<f32>,
    pub targets: Vec<i64>,
    pub rows: usize,
    pub vocab: usize,
}

pub fn random_pair(rows: usize, vocab: usize, prompts: usize, noise: f64, seed: u64) -> Pair {
    let dir = tempdir::Dir::new();
    let mut r = Rng(seed);
    let x: Vec<f32> = (0..rows * vocab)
        .map(|_| (3.0 * r.normal()) as f32)
        .collect();
    let y: Vec<f32> = x
        .iter()
        .map(|&v| (v as f64 + noise * r.normal()) as f32)
        .collect();
    let targets: Vec<i64> = (0..rows)
        .map(|_| (r.uniform() * vocab as f64) as i64)
        .collect();
    let mut offs: Vec<i64> = (0..prompts).map(|p| (p * rows / prompts) as i64).collect();
    offs.push(rows as i64);
    let reference = dir.path().join("ref.safetensors");
    let candidate = dir.path().join("cand.safetensors");
    for (path, v) in [(&reference, &x), (&candidate, &y)] {
        write(
            path,
            vec![
                ("logits", floats(Dtype::F32, &[rows, vocab], v)),
                ("targets", i64s(&[rows], &targets)),
                ("prompt_offsets", i64s(&[prompts + 1], &offs)),
            ],
            None,
        );
    }
    Pair {
        dir,
        reference,
        candidate,
        x,
        y,
        targets,
        rows,
        vocab,
    }
}

pub fn klgauge(args: &[&str]) -> Output {
    klgauge_env(args, &[])
}

/// `klgauge` with extra environment variables.
pub fn klgauge_env(args: &[&str], env: &[(&str, &str)]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_klgauge"))
        .args(args)
        .envs(env.iter().copied())
        .output()
        .expect("run klgauge")
}

pub fn json(path: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
}

/// A minimal self-removing temporary directory (no extra dependency).
pub mod tempdir {
    use std::path::{Path, PathBuf};
    use std::sync::atomic::{AtomicUsize, Ordering};

    static N: AtomicUsize = AtomicUsize::new(0);

    pub struct Dir(PathBuf);

    impl Dir {
        pub fn new() -> Dir {
            let p = std::env::temp_dir().join(format!(
                "klgauge-test-{}-{}",
                std::process::id(),
                N.fetch_add(1, Ordering::SeqCst)
            ));
            std::fs::create_dir_all(&p).unwrap();
            Dir(p)
        }
        pub fn path(&self) -> &Path {
            &self.0
        }
    }

    impl Drop for Dir {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }
}

/// Straightforward float64 KL(p||q) of two logit rows (log-softmax by max
/// subtraction, the textbook definition; common practice).
pub fn kl_f64(x: &[f32], y: &[f32]) -> f64 {
    let lsm = |v: &[f32]| -> Vec<f64> {
        let m = v.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b as f64));
        let s: f64 = v.iter().map(|&b| (b as f64 - m).exp()).sum();
        v.iter().map(|&b| b as f64 - m - s.ln()).collect()
    };
    let (lp, lq) = (lsm(x), lsm(y));
    lp.iter().zip(&lq).map(|(a, b)| a.exp() * (a - b)).sum()
}
