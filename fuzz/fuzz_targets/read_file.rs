//! One fuzz input = one logit file. Opening it must either fail with an
//! input error or give a file whose every row can be read; nothing may
//! panic, hang or read out of bounds.
#![no_main]

use klgauge::input::LogitFile;
use libfuzzer_sys::fuzz_target;

fn scratch() -> std::path::PathBuf {
    std::env::temp_dir().join(format!("klgauge-fuzz-read-{}.safetensors", std::process::id()))
}

fuzz_target!(|data: &[u8]| {
    let path = scratch();
    std::fs::write(&path, data).unwrap();
    let f = match LogitFile::open(&path) {
        Ok(f) => f,
        Err(e) => {
            // Input errors name the file, in one line.
            assert!(e.message.starts_with(&path.display().to_string()), "{}", e.message);
            assert!(!e.message.contains('\n'), "{}", e.message);
            return;
        }
    };
    assert!(f.rows > 0 && f.vocab > 0);
    assert_eq!(*f.prompt_starts.first().unwrap(), 0);
    assert_eq!(*f.prompt_starts.last().unwrap(), f.rows);
    assert!(f.prompt_starts.windows(2).all(|w| w[0] < w[1]));
    assert_eq!(f.prompt_of_rows().len(), f.rows);
    if let Some(t) = &f.targets {
        assert_eq!(t.len(), f.rows);
    }
    if let Some(m) = &f.mask {
        assert_eq!(m.len(), f.rows);
    }
    let mut row = vec![0f32; f.vocab];
    let mut blocks = vec![0f64; klgauge::kernel::norm_blocks(f.vocab)];
    for r in 0..f.rows {
        f.read_row(r, &mut row);
        if let Ok(n) = klgauge::kernel::normalise(&row, &mut blocks) {
            assert!((n.argmax as usize) < f.vocab);
            assert!(!n.lse.is_nan() && n.entropy >= -1e-6, "row {r}: {n:?}");
        }
    }
    f.release_before(f.rows);
});
