//! Modes files (`sampling::files::ModesFile::read`, TOML) and text
//! Hessians (`sampling::files::parse_hessian`, for 1–4 atoms) from the input
//! text, and normal modes of a Hessian built from the input bytes
//! (`sampling::modes::normal_modes`: any shape, any values).
#![no_main]
use flipswarm::sampling::files::{parse_hessian, ModesFile};
use flipswarm::sampling::modes::normal_modes;
use libfuzzer_sys::fuzz_target;
use nalgebra::DMatrix;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        let path = std::env::temp_dir().join(format!("flipswarm-fuzz-modes-{}.toml", std::process::id()));
        if std::fs::write(&path, text).is_ok() {
            let _ = ModesFile::read(&path);
        }
        for atoms in 1..=4 {
            if let Ok(h) = parse_hessian(text, 3 * atoms) {
                assert_eq!(h.shape(), (3 * atoms, 3 * atoms));
            }
        }
    }
    // Hessian: first byte = atoms (1–4), second = extra columns, then f64s.
    if data.len() >= 2 {
        let atoms = (data[0] % 4) as usize + 1;
        let n = 3 * atoms;
        let cols = n + (data[1] % 3) as usize;
        let mut vals = data[2..].chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap()));
        let h = DMatrix::from_fn(n, cols, |_, _| vals.next().unwrap_or(0.0));
        let positions: Vec<[f64; 3]> = (0..atoms).map(|k| [k as f64 * 1.4, 0.3 * k as f64, 0.0]).collect();
        let masses = vec![1837.15; atoms];
        let _ = normal_modes(&h, &positions, &masses);
    }
});
