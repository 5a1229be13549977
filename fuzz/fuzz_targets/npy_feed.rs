//! The `--feed` reader on arbitrary bytes, as `.npy` and as `.npz` (issue 7).
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let _ = shunt::probe::inputs::read_feed_bytes(data, false, &["x"]);
    let _ = shunt::probe::inputs::read_feed_bytes(data, true, &["x", "mask"]);
});
