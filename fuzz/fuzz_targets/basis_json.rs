//! Basis-set files in the basis-set-exchange JSON schema (`BasisSetData::from_json_str`).
#![no_main]
use flipswarm::electronic::qc::basis::{BasisSetData, Harmonics};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let _ = BasisSetData::from_json_str(text, "fuzz.json", Harmonics::Cartesian);
    let _ = BasisSetData::from_json_str(text, "fuzz.json", Harmonics::Spherical);
});
