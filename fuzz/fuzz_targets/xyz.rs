//! XYZ and extended XYZ text (`chem::xyz`), and comment-line properties.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let _ = flipswarm::chem::xyz::parse_xyz_str(text, "fuzz.xyz");
    let _ = flipswarm::chem::xyz::parse_single_xyz_str(text, "fuzz.xyz");
    let _ = flipswarm::chem::xyz::parse_extxyz_str(text, "fuzz.xyz");
    if let Some(line) = text.lines().next() {
        let _ = flipswarm::chem::xyz::FrameProperties::parse(line);
    }
});
