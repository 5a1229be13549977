//! Bytes → decode → graph → detection → classification → report, as
//! `shunt scan` does after reading a file (issue 7). Any outcome but a
//! panic, an abort or an unbounded allocation is fine.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(model) = shunt::load::decode(bytes::Bytes::copy_from_slice(data)) else { return };
    let external = shunt::load::ExternalData::none();
    if shunt::load::check_payloads(&model, &external).is_err() {
        return;
    }
    let config = shunt::open::OpenConfig::standard();
    let _ = shunt::scan::scan_model(model, "fuzz.onnx", &config);
});
