//! Fuzz target: the CSV reader must answer every byte string with `Ok` or a
//! located `Err` — never a panic or a hang. It owns no checks of its own
//! beyond that; regressions found here are replayed by
//! tests/fuzz_regressions.rs.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let _ = cairn::data::read_table(bytes, "data.csv");
});
