//! Ensemble TOML → validated configuration (`config::load_str`), with a
//! valid LVC model file beside it so `model.file = "m.toml"` resolves, and
//! with the input also applied as a `--set` override.
#![no_main]
use libfuzzer_sys::fuzz_target;
use std::path::PathBuf;
use std::sync::OnceLock;

fn base() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let d = std::env::temp_dir().join(format!("flipswarm-fuzz-config-{}", std::process::id()));
        std::fs::create_dir_all(&d).unwrap();
        std::fs::write(d.join("m.toml"), "frequencies_ev = [0.1]\nvertical_ev = [0.0, 1.0]\n[[gradient]]\nstate = 1\nmode = 0\nvalue_ev = -0.1\n").unwrap();
        d
    })
}

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let _ = flipswarm::config::load_str(text, "fuzz.toml", base(), &[]);
    if let Some((head, tail)) = text.split_once('\n') {
        let _ = flipswarm::config::load_str(tail, "fuzz.toml", base(), &[head.to_string()]);
    }
});
