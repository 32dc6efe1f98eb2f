//! LVC model files (`Lvc::from_toml`); a model that loads is also evaluated
//! once at the origin through the generic back end.
#![no_main]
use flipswarm::electronic::models::{DiabaticBackend, Lvc};
use flipswarm::electronic::{Backend, Request};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    if let Ok(model) = Lvc::from_toml(text, "fuzz-model.toml") {
        let mut b = DiabaticBackend::new(model);
        let n = b.info().masses.len();
        if n <= 4096 {
            let _ = b.compute(&vec![0.0; n], &Request::gradient_of(0));
        }
    }
});
